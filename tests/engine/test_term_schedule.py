"""How a round spreads its visits of adjusted users over its steps (``Training.term_schedule``)."""

from __future__ import annotations

import pytest
import torch
from synthetic import mnar_logs

import tasks.engine.trainer as trainer
from tasks.engine.settings import Settings
from tasks.engine.trainer import Training

torch.set_num_threads(1)


def _logs():
    return mnar_logs(n_users=300, n_items=60, per_user=8, probe_users=120, probes_per_user=4, seed=5)


def _training(schedule: str, **settings: object) -> Training:
    logs = _logs()
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 3, "model.batch_size": 64,
                              **settings})
    tr = Training(logs.organic, logs.probe, cfg)
    tr.term_schedule = schedule
    return tr


def _picks(tr: Training, monkeypatch: pytest.MonkeyPatch) -> list[list[int]]:
    """Adjusted users picked at each step of one round (empty list: no term on that step)."""
    seen: list[list[int]] = []
    real = trainer.step_loss

    def spy(model, u, i, r, w, norm, weight_decay, pick=None, *args, **kwargs):
        seen.append([] if pick is None else pick.tolist())
        return real(model, u, i, r, w, norm, weight_decay, pick, *args, **kwargs)

    monkeypatch.setattr(trainer, "step_loss", spy)
    tr.run_round(1)
    monkeypatch.setattr(trainer, "step_loss", real)
    return seen


@pytest.mark.parametrize("schedule", ["spread", "packed"])
def test_every_adjusted_user_is_visited_once_per_round(schedule: str, monkeypatch: pytest.MonkeyPatch) -> None:
    tr = _training(schedule, **{"debias.users_per_step": 40})
    picks = _picks(tr, monkeypatch)
    visited = [u for p in picks for u in p]
    assert tr.rounds[0]["calibration"] == "on"
    assert len(visited) == len(set(visited)) == tr.rounds[0]["adjusted_users"]       # once each
    assert len(picks) == tr.n_steps and max(len(p) for p in picks) <= 40
    carrying = [k for k, p in enumerate(picks) if p]
    if schedule == "spread":
        assert len(carrying) == tr.n_steps
    else:
        # ceil(visits / users_per_step) steps carry the term, spaced through the round from its first step
        assert len(carrying) == -(-len(visited) // 40) < tr.n_steps
        assert carrying[0] == 0 and carrying[-1] >= tr.n_steps // 2


def test_packed_equals_spread_bit_for_bit_when_every_step_is_full() -> None:
    """With users_per_step so small that every step is full either way, the packed schedule is the spread
    one: the same picks on the same steps, so the same random numbers and the same weights."""
    states = []
    for schedule in ("spread", "packed"):
        tr = _training(schedule, **{"debias.users_per_step": 1})
        for epoch in (1, 2):
            tr.run_round(epoch)
        states.append(tr.model.state_dict())
    for k, v in states[0].items():
        assert torch.equal(v, states[1][k]), k


def test_packed_schedule_is_reproducible_and_differs_from_spread() -> None:
    runs = {}
    for name, schedule in (("a", "packed"), ("b", "packed"), ("spread", "spread")):
        tr = _training(schedule, **{"debias.users_per_step": 40})
        tr.run_round(1)
        runs[name] = tr.model.state_dict()
    assert all(torch.equal(v, runs["b"][k]) for k, v in runs["a"].items())
    assert not all(torch.equal(v, runs["spread"][k]) for k, v in runs["a"].items())


def test_an_unknown_schedule_is_refused() -> None:
    tr = _training("every-other")
    with pytest.raises(ValueError, match="term_schedule"):
        tr.run_round(1)
