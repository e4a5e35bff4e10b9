"""GPT-2's tanh GELU in training forwards: the same numbers as transformers' module, in cache-sized slices.

transformers' ``NewGELUActivation`` (``activation_function = "gelu_new"``, GPT-2's) spells
``0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3)))`` as eight tensor operations, and autograd adds
eleven more in the backward pass. In the trainer's forwards the MLP's hidden tensor ((rows x tokens)
x 4 width: 20 MB in the demo's RL step) is larger than a core's L2 cache, so each operation is a
trip to main memory. :class:`_TanhGELU` runs the same operations with the same kernels, forward and
backward, on slices of 2**17 elements that stay in L2. The backward spells out the operations
autograd runs for that expression (the products' backward, ``tanh_backward``, the power's backward
``grad * (3 * x.pow(2))``, and the three contributions to ``x`` added in the order autograd's
engine adds them), so every value, forward and gradient, is bit-identical to the module's
(tests/test_trainer_fast_paths.py compares them on a model's whole forward and backward). It keeps two
tensors for the backward where autograd keeps four. Measured on a (9728, 512) float32 tensor, one
thread: forward and backward 51-55 ms -> 34 ms.

Bit-identity needs the stock kernels to see the same elements in the same vector lanes: the slices
are whole multiples of the vector width and the fast path runs only on contiguous float32 CPU tensors
with one torch thread (several threads split the stock kernels elsewhere); any other input goes
through the module's own arithmetic. :func:`chunked_tanh_gelu` swaps it into models for a training
forward and puts the modules back after; models that recompute their activations in the backward
pass (gradient checkpointing compares what each forward saved) are left as they are.
"""
from __future__ import annotations

import contextlib
import math
from typing import Iterator

import torch

__all__ = ["chunked_tanh_gelu"]

_SLICE = 1 << 17  # elements: 512 KiB a float32 slice; the backward's five slices fit a 2 MiB L2
_C = math.sqrt(2.0 / math.pi)  # transformers' NewGELUActivation constants, as it writes them
_KAPPA = 0.044715


def _fast(x: torch.Tensor) -> bool:
    return x.dtype == torch.float32 and x.device.type == "cpu" and x.is_contiguous() and torch.get_num_threads() == 1


def _forward(x: torch.Tensor, keep_tanh: bool) -> tuple[torch.Tensor, torch.Tensor | None]:
    """y and, with ``keep_tanh``, t5 = tanh(C (x + KAPPA x^3)) (what the backward needs besides x)."""
    y = torch.empty_like(x)
    t5 = torch.empty_like(x) if keep_tanh else None
    xf, yf = x.view(-1), y.view(-1)
    scratch = torch.empty(min(_SLICE, xf.numel()), dtype=x.dtype)
    t_all = t5.view(-1) if t5 is not None else None
    t_scratch = torch.empty_like(scratch) if t5 is None else None
    for s in range(0, xf.numel(), _SLICE):
        xs, ys = xf[s:s + _SLICE], yf[s:s + _SLICE]
        t = t_all[s:s + _SLICE] if t_all is not None else t_scratch[:xs.numel()]
        b = scratch[:xs.numel()]
        torch.pow(xs, 3.0, out=t)
        t.mul_(_KAPPA).add_(xs).mul_(_C).tanh_()  # t5
        torch.add(t, 1.0, out=b)  # t6 = 1 + t5
        torch.mul(xs, 0.5, out=ys).mul_(b)  # (0.5 x) * t6
    return y, t5


def _backward(g: torch.Tensor, x: torch.Tensor, t5: torch.Tensor) -> torch.Tensor:
    """dL/dx as autograd computes it through :func:`_stock`, slice by slice."""
    gx = torch.empty_like(x)
    gf, xf, tf, of = g.view(-1), x.view(-1), t5.view(-1), gx.view(-1)
    m = min(_SLICE, xf.numel())
    b1, b2, b3 = torch.empty(m, dtype=x.dtype), torch.empty(m, dtype=x.dtype), torch.empty(m, dtype=x.dtype)
    for s in range(0, xf.numel(), _SLICE):
        gs, xs, ts, o = gf[s:s + _SLICE], xf[s:s + _SLICE], tf[s:s + _SLICE], of[s:s + _SLICE]
        k = xs.numel()
        t6, m1, w = b1[:k], b2[:k], b3[:k]
        torch.add(ts, 1.0, out=t6)
        torch.mul(xs, 0.5, out=m1)
        grad_m1 = t6.mul_(gs)  # y = m1 * t6: grad * t6 and grad * m1
        grad_t6 = m1.mul_(gs)
        torch.ops.aten.tanh_backward(grad_t6, ts, grad_input=w)  # through 1 + t5 unchanged, then tanh
        grad_t3 = w.mul_(_C)  # t4 = C * t3; t3 = x + t2 passes grad_t3 to x and to t2
        grad_t1 = torch.mul(grad_t3, _KAPPA, out=grad_t6)  # t2 = KAPPA * t1
        power = torch.pow(xs, 2.0, out=o).mul_(3.0)  # t1 = x^3: grad * (3 * x^2)
        grad_pow = grad_t1.mul_(power)
        grad_half = grad_m1.mul_(0.5)  # m1 = 0.5 * x
        torch.add(grad_t3, grad_pow, out=o).add_(grad_half)  # autograd's order: (x + t2)'s, the power's, 0.5 x's
    return gx


class _TanhGELU(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x):
        y, t5 = _forward(x, keep_tanh=True)
        ctx.save_for_backward(x, t5)
        return y

    @staticmethod
    def backward(ctx, g):
        x, t5 = ctx.saved_tensors
        return _backward(g.contiguous(), x, t5)


class ChunkedTanhGELU(torch.nn.Module):
    """Stands in for the ``NewGELUActivation`` ``stock`` during a training forward (see the module's
    docstring); inputs off the fast path go through ``stock`` itself."""

    def __init__(self, stock: torch.nn.Module) -> None:
        super().__init__()
        self.__dict__["stock"] = stock  # not a submodule: the model's module tree stays as it was

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if not _fast(x):
            return self.stock(x)
        if torch.is_grad_enabled() and x.requires_grad:
            return _TanhGELU.apply(x)
        return _forward(x, keep_tanh=False)[0]


@contextlib.contextmanager
def chunked_tanh_gelu(*models) -> Iterator[None]:
    """Within the block, every ``NewGELUActivation`` of ``models`` (None skipped) is a
    :class:`ChunkedTanhGELU`; afterwards each module is back. Gradients of a forward run inside
    flow after it as usual. A model that recomputes activations in its backward is left alone."""
    try:
        from transformers.activations import NewGELUActivation
    except ImportError:  # pragma: no cover - transformers is a dependency
        yield
        return
    swapped = []
    try:
        for model in models:
            if model is None or any(getattr(m, "gradient_checkpointing", False) is True for m in model.modules()):
                continue
            sites = [(parent, name) for parent in model.modules() for name, child in parent.named_children()
                     if type(child) is NewGELUActivation]
            for parent, name in sites:
                stock = getattr(parent, name)
                swapped.append((parent, name, stock))
                setattr(parent, name, ChunkedTanhGELU(stock))
        yield
    finally:
        for parent, name, module in reversed(swapped):
            setattr(parent, name, module)
