"""What the trainer measures about a step: where its time goes, and how much of its gradient is signal.

:class:`Stopwatch` times named phases (``with clock("sample"): ...``) and adds up
repeated phases (micro-batches). :class:`GradientMoments` accumulates per-prompt
gradients and gives the gradient signal-to-noise ratio of the step.
"""
from __future__ import annotations

import contextlib
import math
import time
from typing import Iterator, Sequence

import torch

from bonft.trainer.distributed import all_reduce_


class Stopwatch:
    """Seconds per named phase; on a GPU each phase ends with a device sync so the time is the work's."""

    def __init__(self, device: torch.device | str = "cpu") -> None:
        self.totals: dict[str, float] = {}
        self._cuda = torch.device(device).type == "cuda"

    @contextlib.contextmanager
    def __call__(self, phase: str) -> Iterator[None]:
        t0 = time.perf_counter()
        try:
            yield
        finally:
            if self._cuda:
                torch.cuda.synchronize()
            self.totals[phase] = self.totals.get(phase, 0.0) + time.perf_counter() - t0

    def metrics(self, prefix: str = "time/") -> dict[str, float]:
        """``{prefix + phase: seconds}``."""
        return {prefix + phase: sec for phase, sec in self.totals.items()}


class GradientMoments:
    r"""Running sums of per-prompt gradients -> the gradient signal-to-noise ratio.

    With ``g_b`` the gradient of prompt ``b``'s loss term (b = 1..B),
    ``gbar = (1/B) sum_b g_b`` (the step's direction) and the deviations ``d_b = g_b - gbar``:

    .. math:: \mathrm{SNR} = \frac{\lVert \bar g\rVert}{\sqrt{\frac{1}{B-1}\sum_b \lVert d_b\rVert^2}}

    The denominator is the unbiased estimate of ``E||g_b - E g||^2`` (sigma^2), and
    ``E||gbar||^2 = ||E g||^2 + sigma^2 / B``, so ``E[SNR^2] ~ ||E g||^2 / sigma^2 + 1/B``:
    a pure-noise gradient (``E g = 0``) gives about ``1/sqrt(B)``; the signal share
    ``||E g||^2 / sigma^2`` is estimated by ``SNR^2 - 1/B``. A step where a single prompt has a
    non-zero gradient gives exactly ``1/sqrt(B)`` (one prompt cannot tell signal from noise); one
    where none has gives 0. Sums are streamed
    (``sum_b g_b`` and ``sum_b ||g_b||^2``), so memory is one gradient, not B.
    """

    def __init__(self) -> None:
        self.total: list[torch.Tensor] | None = None
        self.sq: torch.Tensor | float = 0.0  # sum_b ||g_b||^2, kept on the gradients' device (no sync per prompt)
        self.count = 0

    def add(self, grads: Sequence[torch.Tensor]) -> None:
        """One prompt's gradient (one tensor per parameter)."""
        g64 = [g.detach().to(torch.float64) for g in grads]
        if self.total is None:
            self.total = [g.clone() for g in g64]
        else:
            for t, g in zip(self.total, g64):
                t.add_(g)
        self.sq = self.sq + sum(g.pow(2).sum() for g in g64)
        self.count += 1

    def snr(self, ctx=None) -> float:
        """SNR over the prompts added here (and on every rank, with a distributed context ``ctx``)."""
        flat = torch.cat([t.reshape(-1) for t in self.total]) if self.total else torch.zeros(1, dtype=torch.float64)
        stats = torch.tensor([float(self.sq), float(self.count)], dtype=torch.float64)
        if ctx is not None and ctx.enabled and ctx.world_size > 1:
            dev = ctx.device if ctx.backend == "nccl" else torch.device("cpu")
            flat, stats = all_reduce_(flat.to(dev), ctx).cpu(), all_reduce_(stats.to(dev), ctx).cpu()
        sq, B = float(stats[0]), float(stats[1])
        if B < 2:
            raise ValueError(f"the gradient SNR needs at least 2 prompts, got {int(B)}")
        mean_sq = float(flat.pow(2).sum()) / B**2  # ||gbar||^2
        dev_sq = max(sq - B * mean_sq, 0.0) / (B - 1)  # sum_b ||g_b - gbar||^2 = sum_b ||g_b||^2 - B ||gbar||^2
        if mean_sq == 0:  # every per-prompt gradient is zero (no credit anywhere): no signal
            return 0.0
        return math.sqrt(mean_sq / dev_sq) if dev_sq > 0 else float("inf")  # inf: B identical gradients
