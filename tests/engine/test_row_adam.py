"""RowAdam, the optimiser of training, against the reference implementation it replaces
(``torch.optim.SparseAdam``)."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from tasks.engine.row_adam import RowAdam


def _tables(seed: int) -> list[nn.Embedding]:
    g = torch.Generator().manual_seed(seed)
    tables = [nn.Embedding(500, 8, sparse=True), nn.Embedding(120, 8, sparse=True), nn.Embedding(500, 1, sparse=True)]
    with torch.no_grad():
        for t in tables:
            t.weight.normal_(0.0, 0.1, generator=g)
    return tables


def _train(opt_cls, steps: int = 60, repeats: bool = True, **kw) -> list[torch.Tensor]:
    tables = _tables(0)
    opt = opt_cls([t.weight for t in tables], **kw)
    g = torch.Generator().manual_seed(1)
    for _ in range(steps):
        if repeats:
            # Repeated rows within a step (a user with several ratings in the batch), as in training.
            u = torch.randint(0, 500, (64,), generator=g)
            i = torch.randint(0, 120, (64,), generator=g)
        else:
            u = torch.randperm(500, generator=g)[:64]
            i = torch.randperm(120, generator=g)[:64]
        r = torch.randint(1, 6, (64,), generator=g).float()
        pred = 3 + (tables[0](u) * tables[1](i)).sum(-1) + tables[2](u).squeeze(-1)
        loss = ((pred - r) ** 2).mean()
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
    return [t.weight.detach().clone() for t in tables]


@pytest.mark.parametrize("kw", [{"lr": 0.02}, {"lr": 0.1, "betas": (0.8, 0.99), "eps": 1e-6}])
def test_same_update_as_torch_sparse_adam(kw):
    # Reference: torch.optim.SparseAdam (PyTorch), the optimiser RowAdam replaces in the trainer.
    # Without repeated rows in a step the arithmetic is the same, bit for bit.
    ours, ref = _train(RowAdam, repeats=False, **kw), _train(torch.optim.SparseAdam, repeats=False, **kw)
    for a, b in zip(ours, ref):
        assert torch.equal(a, b)
    # With repeats, only the order in which a row's entries are summed differs: float rounding, ~1e-8 here.
    ours, ref = _train(RowAdam, **kw), _train(torch.optim.SparseAdam, **kw)
    for a, b in zip(ours, ref):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-6)
    assert not torch.equal(ours[0], _tables(0)[0].weight)     # it did train
    assert all(torch.equal(a, b) for a, b in zip(ours, _train(RowAdam, **kw)))   # and is deterministic


def test_tables_sharing_indices_share_the_merge_and_get_the_same_update():
    """Two tables looked up with one index tensor (factors and bias) take the shared de-duplication path;
    the result must equal optimising each table on its own."""
    def run(together: bool) -> list[torch.Tensor]:
        tables = _tables(3)[0::2]                     # [500, 8] and [500, 1], both indexed by users
        opts = [RowAdam([t.weight for t in tables], lr=0.05)] if together else \
               [RowAdam([t.weight], lr=0.05) for t in tables]
        g = torch.Generator().manual_seed(4)
        for _ in range(20):
            u = torch.randint(0, 500, (64,), generator=g)
            r = torch.randint(1, 6, (64,), generator=g).float()
            loss = ((3 + tables[0](u).sum(-1) + tables[1](u).squeeze(-1) - r) ** 2).mean()
            for o in opts:
                o.zero_grad(set_to_none=True)
            loss.backward()
            for o in opts:
                o.step()
        return [t.weight.detach().clone() for t in tables]
    for a, b in zip(run(True), run(False)):
        assert torch.equal(a, b)


def test_rows_a_step_does_not_touch_stay_put():
    table = nn.Embedding(10, 3, sparse=True)
    before = table.weight.detach().clone()
    opt = RowAdam([table.weight], lr=0.05)
    table(torch.tensor([2, 7, 2])).sum().backward()
    opt.step()
    moved = (table.weight.detach() != before).any(dim=1)
    assert moved.tolist() == [k in (2, 7) for k in range(10)]


def test_rejects_bad_settings():
    with pytest.raises(ValueError, match="learning rate"):
        RowAdam([nn.Parameter(torch.zeros(2))], lr=0.0)
    with pytest.raises(ValueError, match="betas"):
        RowAdam([nn.Parameter(torch.zeros(2))], betas=(1.0, 0.9))
