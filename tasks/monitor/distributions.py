"""Distributions of ratings and predictions: histograms, two-sample distances and tests, and the
night-to-night noise of the selection-skew numbers. Pure functions over numpy arrays; no I/O.

Units used throughout:
- ratings and rating differences (mean shift, Wasserstein-1) are in stars of the configured scale;
- divergences are in bits (log base 2), so Jensen-Shannon divergence lies in [0, 1];
- shares lie in [0, 1]; counts are plain integers.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from tasks.config import ScaleConfig

#: Bins of a continuous scale (``scale.step == 0``) for rating histograms.
CONTINUOUS_RATING_BINS = 20
#: Bins for predicted-rating histograms (PSI, JS). Ten equal-width bins is the usual PSI setup:
#: common practice (no source).
PREDICTION_BINS = 10
#: Floor on bin shares inside PSI so an empty bin gives a large but finite term: common practice
#: (no source); 1e-4 keeps one empty bin's contribution below about 1 for shares of a few percent.
PSI_EPSILON = 1e-4


def rating_bin_edges(scale: ScaleConfig, continuous_bins: int = CONTINUOUS_RATING_BINS) -> np.ndarray:
    """Bin edges for rating histograms, shape ``(L + 1,)``, in stars.

    A stepped scale gets one bin per allowed level (edges half a step either side); a continuous
    scale gets ``continuous_bins`` equal-width bins between ``scale.min`` and ``scale.max``.
    """
    if scale.step > 0:
        levels = np.asarray(scale.levels, dtype=float)
        return np.concatenate([levels - scale.step / 2, [levels[-1] + scale.step / 2]])
    return np.linspace(scale.min, scale.max, continuous_bins + 1)


def prediction_bin_edges(scale: ScaleConfig, bins: int = PREDICTION_BINS) -> np.ndarray:
    """Equal-width bin edges over ``[scale.min, scale.max]`` for predicted ratings, shape ``(bins + 1,)``."""
    return np.linspace(scale.min, scale.max, bins + 1)


def bin_index(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Bin number of each value, shape like ``values`` (ints in ``[0, len(edges) - 2]``).

    Bins are half-open ``[e_i, e_i+1)`` except the last, which is closed (as ``np.histogram``);
    values outside the edges are clipped into the end bins (predictions may overshoot the scale).
    """
    v = np.clip(np.asarray(values, dtype=float), edges[0], edges[-1])
    return np.clip(np.searchsorted(edges, v, side="right") - 1, 0, len(edges) - 2)


def histogram(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Counts of ``values`` per bin, shape ``(len(edges) - 1,)`` (see :func:`bin_index`); NaNs dropped."""
    v = np.asarray(values, dtype=float)
    v = v[~np.isnan(v)]
    return np.bincount(bin_index(v, edges), minlength=len(edges) - 1).astype(np.int64)


def _shares(counts: np.ndarray) -> np.ndarray | None:
    c = np.asarray(counts, dtype=float)
    total = c.sum()
    return None if total <= 0 else c / total


def js_divergence(p_counts: np.ndarray, q_counts: np.ndarray) -> float:
    """Jensen-Shannon divergence in bits between two histograms (counts or shares), in [0, 1].

    ``JS = KL(p || m) / 2 + KL(q || m) / 2`` with ``m = (p + q) / 2``. NaN if either histogram is empty.
    (scipy's ``jensenshannon`` returns the square root of this, the JS distance.)
    """
    p, q = _shares(p_counts), _shares(q_counts)
    if p is None or q is None:
        return math.nan
    m = (p + q) / 2

    def _kl(a: np.ndarray) -> float:
        nz = a > 0
        return float(np.sum(a[nz] * np.log2(a[nz] / m[nz])))

    return float(min(max((_kl(p) + _kl(q)) / 2, 0.0), 1.0))


def wasserstein1(a: np.ndarray, b: np.ndarray) -> float:
    """Wasserstein-1 (earth mover's) distance between two samples of ratings, in stars.

    On the real line W1 is the area between the two empirical CDFs. NaN if either sample is empty.
    """
    a = np.sort(np.asarray(a, dtype=float))
    b = np.sort(np.asarray(b, dtype=float))
    if a.size == 0 or b.size == 0:
        return math.nan
    support = np.unique(np.concatenate([a, b]))
    if support.size < 2:
        return 0.0
    cdf_a = np.searchsorted(a, support[:-1], side="right") / a.size
    cdf_b = np.searchsorted(b, support[:-1], side="right") / b.size
    return float(np.sum(np.abs(cdf_a - cdf_b) * np.diff(support)))


def wasserstein1_binned(a_counts: np.ndarray, b_counts: np.ndarray, points: np.ndarray) -> float:
    """Wasserstein-1 distance in stars between two histograms whose mass sits at ``points`` (sorted
    level values, shape ``(L,)``). Equals :func:`wasserstein1` on the raw ratings of a stepped scale,
    without sorting them. NaN if either histogram is empty."""
    a, b = _shares(a_counts), _shares(b_counts)
    if a is None or b is None:
        return math.nan
    gap = np.abs(np.cumsum(a) - np.cumsum(b))[:-1]
    return float(np.sum(gap * np.diff(np.asarray(points, dtype=float))))


def chi2_homogeneity(a_counts: np.ndarray, b_counts: np.ndarray) -> tuple[float, int, float]:
    """Pearson chi-square test that two histograms over the same bins come from one distribution.

    Returns ``(statistic, degrees_of_freedom, p_value)`` for the 2 x L contingency table, without
    continuity correction; bins empty in both samples are dropped. NaNs when a sample is empty;
    ``(0, 0, 1)`` when only one bin is used (the samples cannot differ).
    """
    table = np.vstack([np.asarray(a_counts, float), np.asarray(b_counts, float)])
    row = table.sum(axis=1)
    if np.any(row <= 0):
        return math.nan, 0, math.nan
    table = table[:, table.sum(axis=0) > 0]
    dof = table.shape[1] - 1
    if dof < 1:
        return 0.0, 0, 1.0
    expected = np.outer(row, table.sum(axis=0)) / table.sum()
    statistic = float(np.sum((table - expected) ** 2 / expected))
    return statistic, int(dof), float(stats.chi2.sf(statistic, dof))


def ks_two_sample(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    """Two-sided two-sample Kolmogorov-Smirnov test with the asymptotic p-value.

    Returns ``(D, p_value)``; D is the largest gap between the two empirical CDFs. The p-value uses
    the Kolmogorov-Smirnov distribution at the effective size ``n*m/(n+m)`` rounded (Smirnov's
    asymptotic form). NaNs if either sample is empty. Meant for a continuous scale: with few tied
    levels the KS p-value is conservative, so stepped scales use :func:`chi2_homogeneity`.
    """
    a = np.sort(np.asarray(a, dtype=float))
    b = np.sort(np.asarray(b, dtype=float))
    if a.size == 0 or b.size == 0:
        return math.nan, math.nan
    points = np.concatenate([a, b])
    gap = np.searchsorted(a, points, side="right") / a.size - np.searchsorted(b, points, side="right") / b.size
    d = float(np.max(np.abs(gap)))
    n_eff = max(1.0, float(np.round(a.size * b.size / (a.size + b.size))))  # 1 + 1 ratings round to 0
    return d, float(np.clip(stats.kstwo.sf(d, n_eff), 0.0, 1.0))


def population_stability_index(actual_counts: np.ndarray, expected_counts: np.ndarray,
                               eps: float = PSI_EPSILON) -> float:
    """PSI = sum over bins of ``(a - e) * ln(a / e)`` with ``a``, ``e`` the bin shares (natural log).

    Shares below ``eps`` are raised to ``eps`` so empty bins stay finite. Symmetric in its two
    arguments. NaN if either histogram is empty.
    """
    a, e = _shares(actual_counts), _shares(expected_counts)
    if a is None or e is None:
        return math.nan
    a = np.maximum(a, eps)
    e = np.maximum(e, eps)
    return float(np.sum((a - e) * np.log(a / e)))


def night_noise_se(organic_bins: np.ndarray, probe_counts: np.ndarray, points: np.ndarray,
                   organic_clusters: np.ndarray | None = None, new_probe_bins: np.ndarray | None = None,
                   new_probe_clusters: np.ndarray | None = None) -> dict[str, float]:
    """Night-to-night standard errors of tonight's mean shift, JS and W1 (stars, bits, stars).

    Tonight's value compares tonight's organic ratings with the window's probe ratings. From one
    night to the next two things are new: the organic sample, and tonight's probe ratings entering
    the reference. Both are counted; the rest of the reference is shared with the previous nights
    and adds no night-to-night noise.

    Arguments: ``organic_bins`` bin number of each organic rating tonight, shape ``(n,)``;
    ``probe_counts`` the window's probe histogram, shape ``(L,)``; ``points`` bin positions in
    stars, shape ``(L,)``; ``new_probe_bins`` bin number of each of tonight's probe ratings (already
    counted in ``probe_counts``); the ``*_clusters`` give the member code of each rating.

    Delta method: to first order each metric moves by the mean, over the new ratings, of a per-bin
    gradient. With respect to organic shares ``p``: the level value (mean shift),
    ``0.5 * log2(p / m)`` (JS, ``m`` = mean of both histograms), and for W1 the sum over the CDF
    gaps at and above the bin of ``sign(F_org - F_probe) * level spacing``; with respect to probe
    shares ``q``: minus the level value, ``0.5 * log2(q / m)``, and minus the W1 gradient. A sample
    of ``n`` new ratings drawn from shares ``p`` with gradient ``h`` moves the metric with variance
    ``sum_u (sum of centred h over member u's ratings)^2 / N^2`` (``N`` = size of the histogram it
    enters). Grouping by member makes it cluster-robust: one member's ratings share that member's
    leniency and are not independent. NaNs when either histogram is empty.
    """
    bins = np.asarray(organic_bins, dtype=np.int64)
    counts = np.bincount(bins, minlength=len(points))
    p, q = _shares(counts), _shares(probe_counts)
    if p is None or q is None:
        return {"mean_shift": math.nan, "js": math.nan, "w1": math.nan}
    points = np.asarray(points, dtype=float)
    m = (p + q) / 2
    with np.errstate(divide="ignore", invalid="ignore"):
        js_p = np.where(p > 0, 0.5 * np.log2(p / m), 0.0)
        js_q = np.where(q > 0, 0.5 * np.log2(q / m), 0.0)
    spans = np.sign(np.cumsum(p) - np.cumsum(q))[:-1] * np.diff(points)
    w1_p = np.concatenate([np.cumsum(spans[::-1])[::-1], [0.0]])
    gradients = {"mean_shift": (points, -points), "js": (js_p, js_q), "w1": (w1_p, -w1_p)}

    def _var(sample_bins: np.ndarray | None, clusters: np.ndarray | None, shares: np.ndarray,
             total: float, h: np.ndarray) -> float:
        if sample_bins is None or len(sample_bins) == 0:
            return 0.0
        sb = np.asarray(sample_bins, dtype=np.int64)
        centred = h[sb] - float(np.sum(shares * h))
        if clusters is None:
            return float(np.sum(centred * centred)) / total ** 2
        per_member = np.bincount(pd.factorize(np.asarray(clusters))[0], weights=centred)
        return float(np.sum(per_member * per_member)) / total ** 2

    n_org, n_probe = float(bins.size), float(np.sum(probe_counts))
    out = {}
    for name, (h_p, h_q) in gradients.items():
        var = (_var(bins, organic_clusters, p, n_org, h_p)
               + _var(new_probe_bins, new_probe_clusters, q, n_probe, h_q))
        out[name] = math.sqrt(var)
    return out


def bin_points(scale: ScaleConfig) -> np.ndarray:
    """Position in stars of each rating bin: the levels of a stepped scale, else the bin centres."""
    if scale.step > 0:
        return np.asarray(scale.levels, dtype=float)
    edges = rating_bin_edges(scale)
    return (edges[:-1] + edges[1:]) / 2


def skew_summary(organic: np.ndarray, probe: np.ndarray, scale: ScaleConfig,
                 organic_users: np.ndarray | None = None, new_probe: np.ndarray | None = None,
                 new_probe_users: np.ndarray | None = None) -> dict:
    """Organic vs probe rating distributions: the selection-skew numbers for one pair of samples.

    Returns counts, means, ``mean_shift`` (organic mean minus probe mean, stars), ``js`` (bits),
    ``w1`` (stars), the two-sample test name/statistic/p-value, and both histograms on the scale's bins.
    """
    organic = np.asarray(organic, dtype=float)
    probe = np.asarray(probe, dtype=float)
    edges = rating_bin_edges(scale)
    org_bins = bin_index(organic, edges)
    h_org = np.bincount(org_bins, minlength=len(edges) - 1).astype(np.int64)
    h_probe = histogram(probe, edges)
    if scale.step > 0:
        test = "chi2"
        stat, _, pvalue = chi2_homogeneity(h_org, h_probe)
        w1 = wasserstein1_binned(h_org, h_probe, bin_points(scale))
    else:
        test = "ks"
        stat, pvalue = ks_two_sample(organic, probe)
        w1 = wasserstein1(organic, probe)
    mean_o = float(organic.mean()) if organic.size else math.nan
    mean_p = float(probe.mean()) if probe.size else math.nan
    se = night_noise_se(org_bins, h_probe, bin_points(scale), organic_users,
                        None if new_probe is None else bin_index(new_probe, edges), new_probe_users)
    return {
        "mean_shift_se": se["mean_shift"], "js_se": se["js"], "w1_se": se["w1"],
        "organic_n": int(organic.size), "probe_n": int(probe.size),
        "organic_mean": mean_o, "probe_mean": mean_p, "mean_shift": mean_o - mean_p,
        "js": js_divergence(h_org, h_probe), "w1": w1,
        "test": test, "stat": stat, "pvalue": pvalue,
        "hist_organic": h_org.tolist(), "hist_probe": h_probe.tolist(),
    }


def profile_movement(profiles_candidate: np.ndarray, profiles_live: np.ndarray) -> np.ndarray:
    """Per-user movement of the rating profile between live and candidate, shape ``(users,)``.

    Inputs are ``users x K`` soft-CDF values (same user order). Movement is the mean over the K
    thresholds of ``|CDF_candidate - CDF_live|``, in [0, 1] (times the threshold spacing it is the
    Wasserstein-1 distance between the two profiles).
    """
    pc = np.asarray(profiles_candidate, dtype=float)
    pl = np.asarray(profiles_live, dtype=float)
    if pc.shape != pl.shape or pc.ndim != 2:
        raise ValueError(f"rating profiles must be two users x K arrays of one shape; got candidate "
                         f"{pc.shape} and live {pl.shape}")
    return np.nanmean(np.abs(pc - pl), axis=1) if pc.shape[1] else np.zeros(pc.shape[0])
