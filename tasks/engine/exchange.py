"""What training workers exchange, behind one small interface; the single-process version does nothing.

The training loop (:class:`tasks.engine.trainer.Training`) is the same in one process and in data-parallel
training. It calls its exchange at fixed points: which ratings are this worker's (:meth:`Exchange.owns`),
every worker's shard size (:meth:`Exchange.sizes`), all workers' reference profiles
(:meth:`Exchange.gather_rows`), sums of per-round figures (:meth:`Exchange.sum`) and, after each backward
pass, the sum of the gradients (:meth:`Exchange.sum_gradients`). :class:`Exchange` is one worker holding
everything: world size 1, rank 0, each call returns its input and sums nothing. The data-parallel version,
:class:`tasks.engine.distributed.GlooExchange`, does the same calls with ``torch.distributed``
collectives. (PyTorch's ``DistributedDataParallel`` follows the same idea: the model code is unchanged and
the communication wraps around it.)

Every worker must make the same calls in the same order (a collective waits for all); so the loop calls
the exchange unconditionally, never under a condition that can differ between workers.
"""

from __future__ import annotations

import numpy as np
import torch


class Exchange:
    """One worker holding every user's ratings: nothing to exchange."""

    rank: int = 0
    world: int = 1

    def owns(self, user_idx: np.ndarray) -> slice | np.ndarray:
        """Which of the rows with these user indices ``[N]`` this worker trains on, as an index into
        them: here all (``slice(None)``, so indexing with it copies nothing)."""
        return slice(None)

    def sizes(self, n: int) -> list[int]:
        """Every worker's ``n`` (e.g. its number of ratings), in rank order."""
        return [n]

    def gather_rows(self, x: torch.Tensor) -> torch.Tensor:
        """Every worker's ``[R_w, ...]`` rows concatenated in rank order (workers may hold different R_w)."""
        return x

    def sum(self, *values: float) -> list[float]:
        """Each value summed over workers."""
        return list(values)

    def sum_gradients(self, model: torch.nn.Module) -> None:
        """Replace each parameter's gradient by its sum over workers (here it is that already)."""
