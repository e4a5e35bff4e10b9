"""Sampling speed and memory against transformers' own ``generate`` on the same model and prompts.

What a user would otherwise call: ``model.generate(..., do_sample=True, top_k=0, top_p=1.0,
num_return_sequences=n)`` with left padding. Both run under ``torch.no_grad`` (generate does so
itself), with EOS off and the same number of new tokens, one thread, interleaved repetitions,
medians. Goals: bonft's ``sample`` >= 1.5x generate's samples/s on every shape, and
peak memory <= generate's for 1 prompt x n = 1024 x 32 tokens on the 6 x 384 model (each method
measured in a fresh process: peak RSS growth over the loaded model).

Beside each shape it prints a ceiling: the samples/s of the model's linear layers alone on the same
shapes (every sampler that runs the model's own forward pays at least these matmuls), so
ceiling / generate is the largest ratio any such sampler can reach, and bonft / ceiling says how
much of the rest (attention, norms, activations, the draw, Python) is left.

On GPT-2 and Llama models the sampler's decoding steps run bonft's own forward
(``bonft/generation/decode_step.py``); ``--arch llama`` runs the speed rows on Llama models of the
same sizes (rotary positions, RMSNorm, gated MLP), the memory row stays on GPT-2.

    python benchmarks/bench_sampling.py [--reps 3] [--skip-memory] [--arch gpt2|llama]
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

import torch

from bonft.generation.sampling import sample
from bonft.tasks import build_tokenizer, get_task
from bonft.trainer.models import build_tiny_model


class NoEos:
    """The char tokenizer with EOS switched off, so both samplers draw exactly max_new_tokens."""

    def __init__(self, tok):
        self._tok = tok
        self.eos_token_id = None
        self.pad_token_id = tok.pad_token_id

    def __call__(self, *a, **kw):
        return self._tok(*a, **kw)

    def decode(self, *a, **kw):
        return self._tok.decode(*a, **kw)


def build(shape: str, arch: str = "gpt2"):
    tok = build_tokenizer()
    layers, width, heads = {"tiny": (2, 128, 4), "6x384": (6, 384, 6)}[shape]
    torch.manual_seed(0)
    model = build_tiny_model(arch, vocab_size=len(tok), pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id,
                             bos_token_id=tok.bos_token_id, layers=layers, width=width, heads=heads, max_positions=160)
    model.eval()
    return model, tok


def run_generate(model, tok, prompts, n, T, seed):
    enc = [tok(p)["input_ids"] for p in prompts]
    Tp = max(map(len, enc))
    ids = torch.full((len(enc), Tp), tok.pad_token_id, dtype=torch.long)
    mask = torch.zeros_like(ids)
    for i, r in enumerate(enc):  # left padding, as generate expects for decoder-only models
        ids[i, Tp - len(r):] = torch.tensor(r)
        mask[i, Tp - len(r):] = 1
    torch.manual_seed(seed)
    out = model.generate(input_ids=ids, attention_mask=mask, do_sample=True, top_k=0, top_p=1.0, temperature=1.0,
                         num_return_sequences=n, max_new_tokens=T, min_new_tokens=T, eos_token_id=None,
                         pad_token_id=tok.pad_token_id)
    assert out.shape == (len(prompts) * n, Tp + T)
    return out


def run_bonft(model, tok, prompts, n, T, seed):
    s = sample(model, NoEos(tok), prompts, n=n, max_new_tokens=T, seed=seed)
    assert s.response_tokens.shape == (len(prompts), n, T)
    return s


def linear_floor(model, tok, prompts, n, T, reps=5) -> float:
    """Seconds that the model's weight matrices alone take for this draw: a lower bound on any sampler.

    Every sampler that runs the model's own forward must push each new token of each of the P*n
    rows through every linear layer (T - 1 decoding steps after the prompt pass), and each prompt
    through them once. Here only those matmuls run (the layers' own modules on random inputs of
    the same shapes; attention, norms, activations, sampling and Python are left out).
    """
    from transformers.pytorch_utils import Conv1D

    layers = [m for m in model.modules() if isinstance(m, (torch.nn.Linear, Conv1D))]
    width = lambda m: m.weight.shape[1] if isinstance(m, torch.nn.Linear) else m.weight.shape[0]
    Tp = max(len(tok(p)["input_ids"]) for p in prompts)
    step_x = [torch.randn(len(prompts) * n, 1, width(m)) for m in layers]
    prompt_x = [torch.randn(len(prompts), Tp, width(m)) for m in layers]

    def run(xs):
        t0 = time.perf_counter()
        for m, x in zip(layers, xs):
            m(x)
        return time.perf_counter() - t0

    with torch.no_grad():
        run(step_x), run(prompt_x)  # warm-up
        step = statistics.median(run(step_x) for _ in range(reps))
        prompt = statistics.median(run(prompt_x) for _ in range(reps))
    return prompt + (T - 1) * step


def speed(shape, P, n, T, reps, arch="gpt2"):
    model, tok = build(shape, arch)
    prompts = [ex.prompt for ex in get_task("ledger").split(n_train=P, n_eval=1, seed=0)[0][:P]]
    times = {"generate": [], "bonft": []}
    run_generate(model, tok, prompts[:1], 2, 2, 0), run_bonft(model, tok, prompts[:1], 2, 2, 0)  # warm-up
    for r in range(reps):  # interleaved
        for name, fn in (("generate", run_generate), ("bonft", run_bonft)):
            t0 = time.perf_counter()
            fn(model, tok, prompts, n, T, r)
            times[name].append(time.perf_counter() - t0)
    g, b = statistics.median(times["generate"]), statistics.median(times["bonft"])
    return P * n / g, P * n / b, P * n / linear_floor(model, tok, prompts, n, T)


def _rss_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def memory_child(method: str) -> None:
    torch.set_num_threads(1)
    model, tok = build("6x384")
    prompts = [get_task("ledger").split(n_train=1, n_eval=1, seed=0)[0][0].prompt]
    base = _rss_mb()
    t0 = time.perf_counter()
    (run_generate if method == "generate" else run_bonft)(model, tok, prompts, 1024, 32, 0)
    print(json.dumps({"peak_mb": _rss_mb() - base, "s": time.perf_counter() - t0}))


def memory(method: str) -> dict:
    out = subprocess.run([sys.executable, __file__, "--memory-child", method], capture_output=True, text=True,
                         check=True, env={**os.environ, "OMP_NUM_THREADS": "1"})
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=3)
    ap.add_argument("--skip-memory", action="store_true")
    ap.add_argument("--arch", default="gpt2", choices=("gpt2", "llama"),
                    help="model family of the speed rows (the goals are stated on gpt2)")
    ap.add_argument("--memory-child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.memory_child:
        return memory_child(args.memory_child)
    torch.set_num_threads(1)
    print(f"load average at start: {os.getloadavg()[0]:.2f}; speed rows on {args.arch}")
    print("ceiling: samples/s if only the model's linear layers ran (no attention, norms, activations, sampling,")
    print("Python); ceiling / generate is the largest ratio any sampler that runs the model's own layers can reach.")
    print(f"{'model':6s} {'prompts x n x tokens':>22s} {'generate/s':>11s} {'bonft/s':>9s} {'ratio':>6s}  (goal >= 1.5x)"
          f" {'ceiling/s':>10s} {'ceiling/generate':>17s} {'bonft/ceiling':>14s}")
    for shape, P, n, T in (("tiny", 16, 16, 8), ("tiny", 8, 16, 64), ("6x384", 8, 16, 16), ("6x384", 8, 16, 64),
                           ("6x384", 1, 64, 64)):
        g, b, c = speed(shape, P, n, T, args.reps, args.arch)
        print(f"{shape:6s} {f'{P} x {n} x {T}':>22s} {g:11.1f} {b:9.1f} {b / g:5.2f}x"
              f"{'':15s} {c:10.1f} {c / g:16.2f}x {b / c:13.2f}")
    if not args.skip_memory:
        mg, mb = memory("generate"), memory("bonft")
        print(f"peak memory, 6x384, 1 x 1024 x 32: generate +{mg['peak_mb']:.0f} MB ({mg['s']:.1f} s), "
              f"bonft +{mb['peak_mb']:.0f} MB ({mb['s']:.1f} s), ratio {mb['peak_mb'] / mg['peak_mb']:.2f} (goal <= 1)")


if __name__ == "__main__":
    main()
