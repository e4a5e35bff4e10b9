"""The trainer's and the demo's fast paths give exactly what the plain paths give.

* ``steps._reference_pairs`` (token lists encoded once per run) against ``encode_pairs`` (the
  tokenizer at every step): the same four tensors, element for element.
* The demo with its stages in worker processes, all at once, each worker sampling its stage's pools
  (``workers = 3``) against the demo run stage after stage in one process (``workers = 1``): the
  same evaluations, tables, gradient figures, best temperatures and pools, bit for bit. The plain
  path is the reference; no outside source is needed for "the same numbers".
"""
import contextlib
import json
import re

import numpy as np
import numpy.testing as npt
import pytest
import torch

from bonft.tasks.base import Example
from bonft.trainer.config import from_dict
from bonft.trainer.demo import DemoConfig, run_demo
from bonft.trainer.run import build_run, encode_pairs
from bonft.trainer.steps import _reference_pairs


@pytest.fixture()
def run(tmp_path):
    return build_run(from_dict(dict(layers=1, width=32, heads=2, train_prompts=64, heldout_prompts=4, rl_steps=1,
                                    prompts_per_step=4, n=2, k=2, threads=1, run_dir=str(tmp_path / "r"))))


def test_reference_pairs_are_encode_pairs(run):
    rng = np.random.default_rng(0)
    for size in (1, 5, 64, 128):  # 128 > the 64 examples: repeated indices, as a warm start draws them
        idx = rng.choice(len(run.train), size=size, replace=size > len(run.train))
        ex = [run.train[i] for i in idx]
        want = encode_pairs(run.tokenizer, [e.prompt for e in ex], [e.reference for e in ex], run.device)
        got = _reference_pairs(run, idx)
        assert len(got) == 4
        for g, w in zip(got, want):
            assert g.dtype == w.dtype and g.shape == w.shape and torch.equal(g, w)


def test_reference_pairs_with_uneven_and_empty_references(run):
    # prompts of 1..30 characters, references of 0..12 (an empty one is EOS alone)
    run.train = [Example(prompt="p" * (1 + 7 * i % 30), answer=None, reference="r" * (5 * i % 13)) for i in range(20)]
    run.__dict__.pop("_reference_tokens", None)
    for idx in ([3], [0, 13, 13, 7], list(range(20))[::-1]):
        ex = [run.train[i] for i in idx]
        want = encode_pairs(run.tokenizer, [e.prompt for e in ex], [e.reference for e in ex], run.device)
        for g, w in zip(_reference_pairs(run, np.array(idx)), want):
            assert g.shape == w.shape and torch.equal(g, w)
    assert min(len(e.reference) for e in run.train) == 0 and max(len(e.prompt) for e in run.train) == 30


def tiny_demo(path, workers):
    return DemoConfig(run_dir=str(path), train_prompts=32, heldout_prompts=4, warm_start_steps=3, warm_start_batch_size=8,
                      rl_steps=2, prompts_per_step=4, n=8, k=4, eval_samples=8, eval_ks=[1, 8], layers=1, width=32, heads=2,
                      max_new_tokens=4, n_boot=50, threads=1, workers=workers, snr_every=1, log_every=1,
                      plan_temperatures=(0.7, 1.3), plan_prompts=4, plan_n=8, plan_policies=("warm_start", "pass_at_k"))


def test_demo_in_workers_draws_what_one_process_draws(tmp_path):
    plain = run_demo(tiny_demo(tmp_path / "plain", workers=1), progress=False)
    fast = run_demo(tiny_demo(tmp_path / "fast", workers=3), progress=False)
    for key in ("results", "table", "best_temperature"):
        assert json.dumps(fast[key]) == json.dumps(plain[key]), key
    # the gradient figures and tables, less the columns of measured time (seconds per step, shares of it)
    untimed = {"step_s", "score_share"}
    for name, g in plain["gradients"].items():
        assert json.dumps({k: v for k, v in fast["gradients"][name].items() if k not in untimed}) == json.dumps(
            {k: v for k, v in g.items() if k not in untimed}), name
    timing_cells = re.compile(r"\| [0-9.]+ \| [0-9]+% \|$", re.M)
    assert timing_cells.sub("", fast["report"]) == timing_cells.sub("", plain["report"])
    assert set(fast["cpu_seconds"]) == set(fast["seconds"]) == {"warm_start", "rl_stages", "evaluation"}
    # each worker sampled its own stage's pools (evaluation temperature, and the sweep for pass_at_k)
    names = {p.relative_to(tmp_path / "plain") for p in (tmp_path / "plain").glob("*/pools-*.npz")}
    assert names == {p.relative_to(tmp_path / "fast") for p in (tmp_path / "fast").glob("*/pools-*.npz")}
    assert len(names) == 4 + 2 * 2  # 4 stages at T = 1; warm start and pass@k at T = 0.7 and 1.3
    for name in names:
        with np.load(tmp_path / "plain" / name) as a, np.load(tmp_path / "fast" / name) as b:
            assert set(a.files) == set(b.files)
            for key in a.files:
                npt.assert_array_equal(a[key], b[key])


@pytest.fixture()
def one_thread():
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.mark.parametrize("shape", [(3, 5), (2, 7, 33), (1, 1 << 17), (9, 40_001)])  # tails off the vector width; several slices
def test_chunked_gelu_is_transformers_gelu_new_bit_for_bit(one_thread, shape):
    from transformers.activations import NewGELUActivation

    from bonft.generation.gelu import ChunkedTanhGELU, _fast

    gen = torch.Generator().manual_seed(sum(shape))
    x = torch.randn(shape, generator=gen) * 4  # tanh's saturated ends too
    x.view(-1)[:4] = torch.tensor([0.0, -0.0, 30.0, -30.0])
    g = torch.randn(shape, generator=gen)
    stock, fast = NewGELUActivation(), ChunkedTanhGELU(NewGELUActivation())
    assert _fast(x)
    a, b = x.clone().requires_grad_(True), x.clone().requires_grad_(True)
    ya, yb = stock(a), fast(b)
    ya.backward(g)
    yb.backward(g)
    assert torch.equal(ya, yb) and torch.equal(a.grad, b.grad)
    with torch.no_grad():
        assert torch.equal(fast(x), stock(x))
    assert float((a.grad - g * 0.5).abs().max()) > 0.1  # a real gradient, not the pass-through of a linear map


def test_training_forward_and_backward_with_chunked_gelu_are_bit_identical(one_thread):
    from transformers.activations import NewGELUActivation

    from bonft.generation import sequence_logprobs
    from bonft.generation.gelu import ChunkedTanhGELU, chunked_tanh_gelu
    from bonft.tasks import build_tokenizer
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=2, width=128, heads=4, max_positions=64, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    anchor = build_tiny_model("gpt2", vocab_size=len(tok), layers=2, width=128, heads=4, max_positions=64, seed=1,
                              pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    gen = torch.Generator().manual_seed(0)
    B, n, Tp, T = 16, 32, 20, 4  # the MLP's hidden tensor: 16 * 32 * 4 * 512 elements, two slices
    prompts = torch.randint(3, len(tok), (B, Tp), generator=gen)
    pvalid = torch.ones(B, Tp, dtype=torch.long)
    pvalid[::3, :5] = 0  # left padding
    resp = torch.randint(3, len(tok), (B, n, T), generator=gen)
    rvalid = torch.ones(B, n, T, dtype=torch.long)
    rvalid[:, ::2, 3:] = 0
    credit = torch.randn(B, n, 1, generator=gen)

    def step(fast: bool):
        model.zero_grad(set_to_none=True)
        with chunked_tanh_gelu(model, anchor) if fast else contextlib.nullcontext():
            with torch.no_grad():
                ref = sequence_logprobs(anchor, prompts, pvalid, resp, rvalid, temperature=0.9)
            logp = sequence_logprobs(model, prompts, pvalid, resp, rvalid, temperature=0.9)
            if fast:
                assert sum(type(m) is ChunkedTanhGELU for m in model.modules()) == 2
        ((logp * credit).sum() + ((logp - ref) ** 2).sum()).backward()
        return logp.detach(), ref, [p.grad.clone() for p in model.parameters()]

    plain, fast = step(False), step(True)
    assert torch.equal(plain[0], fast[0]) and torch.equal(plain[1], fast[1])
    assert all(torch.equal(a, b) for a, b in zip(plain[2], fast[2]))
    assert sum(float(g.abs().sum()) > 0 for g in fast[2]) >= len(fast[2]) - 1  # the gradients are not all zero
    assert sum(type(m) is NewGELUActivation for m in model.modules()) == 2  # the model's own modules are back
