"""Selection-skew and drift metrics: pure functions over numpy arrays and pandas frames.

No I/O and no Prefect here; everything is deterministic for a given input.

Units used throughout:
- ratings and rating differences (mean shift, Wasserstein-1) are in stars of the configured scale;
- divergences are in bits (log base 2), so Jensen-Shannon divergence lies in [0, 1];
- shares lie in [0, 1]; counts are plain integers.

The nightly entry point is :func:`compute_night_metrics`, which turns one night's inputs into one flat
row of the metrics time series (schema ``tasks.schemas.NIGHTLY_METRICS``).
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from tasks.config import ScaleConfig
from tasks.schemas import NIGHTLY_METRICS, ORGANIC, PROBE

#: Segment names of :func:`user_skew_segments`, in display order.
SEGMENTS = ("up", "down", "neutral", "unknown")

#: Bins of a continuous scale (``scale.step == 0``) for rating histograms.
CONTINUOUS_RATING_BINS = 20
#: Bins for predicted-rating histograms (PSI, JS). Ten equal-width bins is the usual PSI setup:
#: common practice (no source).
PREDICTION_BINS = 10
#: Floor on bin shares inside PSI so an empty bin gives a large but finite term: common practice
#: (no source); 1e-4 keeps one empty bin's contribution below about 1 for shares of a few percent.
PSI_EPSILON = 1e-4
#: Users shown in the "most skewed" list need at least this many probe ratings (one probe is too noisy).
MOST_SKEWED_MIN_PROBES = 2
MOST_SKEWED_SHOWN = 5

_WINDOW_COLUMNS = ("user_id", "item_id", "rating", "source", "dt")


# --------------------------------------------------------------------------------------------------
# Histograms and two-sample distances
# --------------------------------------------------------------------------------------------------

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


# --------------------------------------------------------------------------------------------------
# Per-user skew and segments
# --------------------------------------------------------------------------------------------------

def _check_window(window: pd.DataFrame, needed: Sequence[str] = _WINDOW_COLUMNS) -> None:
    missing = [c for c in needed if c not in window.columns]
    if missing:
        raise ValueError(f"ratings window lacks column(s) {missing}; has {list(window.columns)}")


def _per_user_table(codes: np.ndarray, users: pd.Index, rating: np.ndarray, is_org: np.ndarray,
                    is_probe: np.ndarray) -> pd.DataFrame:
    n = len(users)
    out = {}
    for mask, name in ((is_org, "organic"), (is_probe, "probe")):
        count = np.bincount(codes[mask], minlength=n)
        total = np.bincount(codes[mask], weights=rating[mask], minlength=n)
        out[f"{name}_n"] = count
        out[f"{name}_mean"] = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    frame = pd.DataFrame(out, index=pd.Index(users, name="user_id"))
    frame["skew"] = frame["organic_mean"] - frame["probe_mean"]
    return frame


def _factorize_window(window: pd.DataFrame) -> tuple[np.ndarray, pd.Index, np.ndarray, np.ndarray, np.ndarray]:
    codes, users = pd.factorize(window["user_id"], sort=True)
    rating = window["rating"].to_numpy(dtype=float)
    is_org = (window["source"] == ORGANIC).to_numpy(dtype=bool)
    is_probe = (window["source"] == PROBE).to_numpy(dtype=bool)
    return codes, pd.Index(users), rating, is_org, is_probe


def _dates_equal(dt: pd.Series, run_date: str) -> np.ndarray:
    """Boolean mask of rows whose ``dt`` is ``run_date``; accepts strings, categoricals (pyarrow's
    hive partition column) and datetimes."""
    if pd.api.types.is_datetime64_any_dtype(dt):
        dt = dt.dt.strftime("%Y-%m-%d")
    elif dt.dtype == object:
        dt = dt.astype(str)
    return (dt == run_date).to_numpy(dtype=bool)


def user_skew(window: pd.DataFrame) -> pd.DataFrame:
    """Per-user organic and probe rating counts and means over ``window``.

    Returns a frame indexed by ``user_id`` (sorted) with columns ``organic_n``, ``organic_mean``,
    ``probe_n``, ``probe_mean`` and ``skew`` = organic mean minus probe mean in stars (NaN unless the
    user has both kinds of rating).
    """
    _check_window(window, ("user_id", "rating", "source"))
    return _per_user_table(*_factorize_window(window))


def segment_of(skew: pd.Series | np.ndarray, margin: float) -> np.ndarray:
    """Segment label per skew value: "up" above ``margin``, "down" below ``-margin``, else
    "neutral"; NaN skew (no probe or no organic rating) is "unknown"."""
    s = np.asarray(skew, dtype=float)
    out = np.full(s.shape, "neutral", dtype=object)
    out[s > margin] = "up"
    out[s < -margin] = "down"
    out[np.isnan(s)] = "unknown"
    return out


def user_skew_segments(window: pd.DataFrame, margin: float) -> pd.Series:
    """Segment of every user in ``window`` by their selection skew (``cfg.evaluate.skew_margin`` stars).

    Returns a Series indexed by ``user_id`` (sorted), named ``segment``, with values "up" (organic mean
    exceeds probe mean by more than ``margin``), "down" (falls short by more), "neutral", or "unknown"
    (no probe rating or no organic rating in the window).
    """
    per_user = user_skew(window)
    return pd.Series(segment_of(per_user["skew"], margin), index=per_user.index, name="segment")


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


# --------------------------------------------------------------------------------------------------
# The nightly row
# --------------------------------------------------------------------------------------------------

def jsonable(obj: object) -> object:
    """Recursively turn numpy scalars/arrays into Python values and NaN/inf into None (strict JSON)."""
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray, pd.Series)):
        return [jsonable(v) for v in list(obj)]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    return obj


def _float(x: object) -> float:
    try:
        f = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan
    return f


def _int(x: object) -> int | None:
    if x is None:
        return None
    f = _float(x)
    return None if math.isnan(f) else int(f)


def _ratio(num: object, den: object) -> float:
    n, d = _float(num), _float(den)
    return n / d if d and d > 0 and not math.isnan(n) else math.nan


def _quantile(values: np.ndarray, q: float) -> float:
    return float(np.quantile(values, q)) if values.size else math.nan


def compute_night_metrics(
    run_date: str,
    window: pd.DataFrame,
    scale: ScaleConfig,
    skew_margin: float,
    *,
    probe_errors: pd.Series | None = None,
    reference_shares: Sequence[float] | None = None,
    pred_candidate: np.ndarray | None = None,
    pred_live: np.ndarray | None = None,
    profiles_candidate: np.ndarray | None = None,
    profiles_live: np.ndarray | None = None,
    evaluation: Mapping | None = None,
    volumes: Mapping | None = None,
    versions: Mapping[str, str | None] | None = None,
) -> dict:
    """One night's drift metrics as one flat row (keys = columns of ``schemas.NIGHTLY_METRICS``).

    Inputs:
    - ``window``: validated ratings of the training window (user_id, item_id, rating in stars,
      source "organic"/"probe", dt YYYY-MM-DD); tonight = rows with ``dt == run_date``.
    - ``scale``: ``cfg.scale``; ``skew_margin``: ``cfg.evaluate.skew_margin`` (stars).
    - ``probe_errors``: per-user probe error (index user_id, stars); ``reference_shares``: share of
      users drawn as reference users, one per training round.
    - ``pred_candidate`` / ``pred_live``: predicted ratings (stars) on one common sample of pairs,
      shape ``(pairs,)``; live is None before the first promotion.
    - ``profiles_candidate`` / ``profiles_live``: ``users x K`` soft-CDF rating profiles, same user order.
    - ``evaluation``: ``{"candidate": {"mae", "mae_lo", "mae_hi", "rmse", ..., "n", "segments"}, "shadow":
      ..., "live": ...}`` (any may be None).
    - ``volumes``: rows_read, rows_ingested, rows_quarantined, quarantined_by_reason, new_users,
      new_items, active_users, probe_users (active/probe users default to counts from tonight's rows).
    - ``versions``: ``{"candidate": id, "live": id}`` for the report; any further keys (e.g. the
      candidate's "state" and the "gate" reason) are kept in ``detail_json`` and shown there.

    Selection skew "tonight" compares tonight's organic ratings with every probe rating in the
    window: probes are few per night (a few percent of active members), so a nightly probe sample is
    too noisy to show a shift, while the window's probes are a steady MAR reference and tonight's
    organic ratings react the same night members start choosing differently.
    """
    _check_window(window)
    volumes = dict(volumes or {})
    versions = dict(versions or {})
    levels_edges = rating_bin_edges(scale)
    codes, users, rating, is_org, is_probe = _factorize_window(window)
    is_tonight = _dates_equal(window["dt"], run_date)

    org_tonight = is_org & is_tonight
    probe_tonight = is_probe & is_tonight
    tonight = skew_summary(rating[org_tonight], rating[is_probe], scale, organic_users=codes[org_tonight],
                           new_probe=rating[probe_tonight], new_probe_users=codes[probe_tonight])
    whole = skew_summary(rating[is_org], rating[is_probe], scale)

    per_user = _per_user_table(codes, users, rating, is_org, is_probe)
    seg = segment_of(per_user["skew"], skew_margin)
    both = per_user["skew"].dropna()
    n_both = int(both.size)
    shares = {s: (float(np.sum(seg == s)) / n_both if n_both else math.nan) for s in ("up", "down", "neutral")}

    segments: dict[str, dict] = {}
    seg_code = np.select([seg == name for name in SEGMENTS], list(range(len(SEGMENTS))))
    seg_by_row = seg_code[codes]
    for code, name in enumerate(SEGMENTS):
        in_seg = seg_by_row == code
        s = skew_summary(rating[is_org & in_seg], rating[is_probe & in_seg], scale)
        segments[name] = {"users": int(np.sum(seg_code == code)),
                          **{k: s[k] for k in ("organic_n", "probe_n", "organic_mean", "probe_mean",
                                               "mean_shift", "js", "w1", "pvalue")}}

    eligible = per_user[(per_user["probe_n"] >= MOST_SKEWED_MIN_PROBES) & per_user["skew"].notna()]
    order = eligible.assign(_abs=eligible["skew"].abs()).sort_values(["_abs"], ascending=False, kind="stable")
    most_skewed = [{"user_id": str(uid), "organic_n": int(r["organic_n"]), "probe_n": int(r["probe_n"]),
                    "organic_mean": float(r["organic_mean"]), "probe_mean": float(r["probe_mean"]),
                    "skew": float(r["skew"])} for uid, r in order.head(MOST_SKEWED_SHOWN).iterrows()]

    # probe errors and reference users
    pe = np.asarray(probe_errors.dropna() if probe_errors is not None else [], dtype=float)
    ref = np.asarray(list(reference_shares or []), dtype=float)

    # predicted-rating distributions
    pred_edges = prediction_bin_edges(scale)
    pc = None if pred_candidate is None else np.asarray(pred_candidate, dtype=float)
    pl = None if pred_live is None else np.asarray(pred_live, dtype=float)
    if pc is not None and pl is not None and pc.shape != pl.shape:
        raise ValueError(f"pred_candidate {pc.shape} and pred_live {pl.shape} must cover the same pairs")
    h_pc = histogram(pc, pred_edges) if pc is not None else None
    h_pl = histogram(pl, pred_edges) if pl is not None else None
    both_preds = h_pc is not None and h_pl is not None
    move = (profile_movement(profiles_candidate, profiles_live)
            if profiles_candidate is not None and profiles_live is not None else np.zeros(0))
    move = move[~np.isnan(move)]

    # active and probe users tonight (volumes win when the flow supplies them)
    active = volumes.get("active_users", np.unique(codes[is_tonight]).size)
    probers = volumes.get("probe_users", np.unique(codes[is_tonight & is_probe]).size)

    row: dict = {
        "run_date": run_date,
        "candidate_version": versions.get("candidate"),
        "live_version": versions.get("live"),
        "skew_organic_n": tonight["organic_n"], "skew_probe_n": tonight["probe_n"],
        "skew_organic_mean": tonight["organic_mean"], "skew_probe_mean": tonight["probe_mean"],
        "skew_mean_shift": tonight["mean_shift"], "skew_js": tonight["js"], "skew_w1": tonight["w1"],
        "skew_mean_shift_se": tonight["mean_shift_se"], "skew_js_se": tonight["js_se"],
        "skew_w1_se": tonight["w1_se"],
        "skew_test": tonight["test"], "skew_stat": tonight["stat"], "skew_pvalue": tonight["pvalue"],
        "window_organic_n": whole["organic_n"], "window_probe_n": whole["probe_n"],
        "window_organic_mean": whole["organic_mean"],
        "window_mean_shift": whole["mean_shift"], "window_js": whole["js"], "window_w1": whole["w1"],
        "window_pvalue": whole["pvalue"],
        "users_with_both": n_both, "users_unknown": int(np.sum(seg == "unknown")),
        "user_skew_mean": float(both.mean()) if n_both else math.nan,
        "user_skew_median": float(both.median()) if n_both else math.nan,
        "share_up": shares["up"], "share_down": shares["down"], "share_neutral": shares["neutral"],
        "probe_error_users": int(pe.size), "probe_error_mean": float(pe.mean()) if pe.size else math.nan,
        "probe_error_median": _quantile(pe, 0.5), "probe_error_p90": _quantile(pe, 0.9),
        "reference_rounds": int(ref.size), "reference_share_mean": float(ref.mean()) if ref.size else math.nan,
        "pred_pairs": int(pc.size) if pc is not None else 0,
        "pred_candidate_mean": float(np.nanmean(pc)) if pc is not None and pc.size else math.nan,
        "pred_live_mean": float(np.nanmean(pl)) if pl is not None and pl.size else math.nan,
        "pred_psi": population_stability_index(h_pc, h_pl) if both_preds else math.nan,
        "pred_js": js_divergence(h_pc, h_pl) if both_preds else math.nan,
        "profile_users": int(move.size),
        "profile_move_mean": float(move.mean()) if move.size else math.nan,
        "profile_move_p90": _quantile(move, 0.9),
        "rows_read": _int(volumes.get("rows_read")), "rows_ingested": _int(volumes.get("rows_ingested")),
        "rows_quarantined": _int(volumes.get("rows_quarantined")),
        "quarantine_share": _ratio(volumes.get("rows_quarantined"), volumes.get("rows_read")),
        "new_users": _int(volumes.get("new_users")), "new_items": _int(volumes.get("new_items")),
        "active_users": _int(active), "probe_users": _int(probers),
        "probe_coverage": _ratio(probers, active),
    }

    eval_segments: dict[str, object] = {}
    for model in ("candidate", "shadow", "live"):
        ev = (evaluation or {}).get(model) or {}
        for stat in ("mae", "mae_lo", "mae_hi", "rmse", "rmse_lo", "rmse_hi"):
            row[f"{model}_{stat}"] = _float(ev.get(stat))
        row[f"{model}_n"] = _int(ev.get("n"))
        if ev.get("segments"):
            eval_segments[model] = ev["segments"]

    detail = {
        "rating_edges": levels_edges, "levels": list(scale.levels) if scale.step > 0 else None,
        "hist_tonight_organic": tonight["hist_organic"], "hist_window_probe": tonight["hist_probe"],
        "hist_window_organic": whole["hist_organic"],
        "segments": segments, "skew_margin": skew_margin, "most_skewed_users": most_skewed,
        "probe_error_quantiles": {f"p{int(q * 100)}": _quantile(pe, q) for q in (0.1, 0.25, 0.5, 0.75, 0.9)},
        "reference_shares": ref,
        "pred_edges": pred_edges,
        "pred_hist_candidate": h_pc, "pred_hist_live": h_pl,
        "evaluation_segments": eval_segments,
        "quarantined_by_reason": dict(sorted((volumes.get("quarantined_by_reason") or {}).items())),
        "versions": {str(k): (None if v is None else str(v)) for k, v in sorted(versions.items())},
    }
    row["detail_json"] = json.dumps(jsonable(detail), sort_keys=True, allow_nan=False)

    unknown = set(row) - set(NIGHTLY_METRICS.names)
    assert not unknown, f"metric keys missing from schemas.NIGHTLY_METRICS: {sorted(unknown)}"
    return row
