"""Tests of bonft.generation.on_policy.check_on_policy on a tiny GPT-2 built from a config (no download).

References used below (each computed here independently of the module):
- top-k truncation: keep the k largest logits (torch.topk), the rest get probability 0 -- the rule
  transformers' generate applies with top_k (its GenerationConfig default is top_k=50, from
  transformers' documentation and source);
- top-p (nucleus) truncation, Holtzman et al. 2020, "The Curious Case of Neural Text Degeneration":
  the smallest set of most likely tokens whose mass reaches p, renormalised (numpy sort here);
- KL divergence of two categorical laws: torch.distributions.kl_divergence (reference implementation);
- for q = p restricted to a set S and renormalised, KL(q || p) = -log p(S) (from the definition of KL,
  Cover & Thomas, "Elements of Information Theory", eq. 2.26).
"""
import json
import math

import numpy as np
import pytest
import torch
from transformers import GPT2Config, GPT2LMHeadModel

from bonft.testing import OnPolicyReport, check_on_policy

pytestmark = pytest.mark.usefixtures("one_thread")
V = 128  # > 50: generate's default top_k truncates
PROMPTS = [[5, 17, 3], [9, 2]]


def tiny_gpt2(init=0.02, seed=0):
    """A 2-layer GPT-2 over 128 tokens; init=0.02 gives near-flat next-token laws, larger spreads them."""
    torch.manual_seed(seed)
    cfg = GPT2Config(vocab_size=V, n_positions=32, n_embd=32, n_layer=2, n_head=2, bos_token_id=0,
                     eos_token_id=0, initializer_range=init)
    return GPT2LMHeadModel(cfg).eval()


def step_logits(model, d):
    """(n, T, V) logits that predicted each drawn response token, from a fresh forward pass."""
    P, T = d["input_ids"].shape[1], d["response_ids"].shape[1]
    with torch.no_grad():
        return model(torch.cat([d["input_ids"], d["response_ids"]], 1)).logits[:, P - 1:P - 1 + T].double()


def full_softmax_logprobs(model, input_ids, response_ids):
    """A user's log-prob function: log softmax(logits) at temperature 1, gathered at the response."""
    P = input_ids.shape[1]
    logits = model(torch.cat([input_ids, response_ids], 1)).logits[:, P - 1:-1]
    return torch.log_softmax(logits, -1).gather(-1, response_ids[..., None])[..., 0]


def masked(report, key):
    return torch.cat([d[key][d["mask"]] for d in report.draws])


@pytest.fixture(scope="module")
def flat():
    return tiny_gpt2()


def test_generate_default_top_k_is_flagged_with_the_mass_outside_the_top_50(flat):
    r = check_on_policy(flat, PROMPTS, n=6, max_new_tokens=5)
    assert not r.ok and r.verdict == "off-policy"
    assert r.settings["top_k"] == 50 and "top_k" not in r.settings["given"]
    expected = []
    for d in r.draws:
        logits = step_logits(flat, d)
        p = torch.softmax(logits, -1)
        top = torch.topk(logits, 50, dim=-1).indices  # the tokens generate can draw
        outside = 1.0 - p.gather(-1, top).sum(-1)  # (n, T): loss mass generate never draws
        torch.testing.assert_close(d["missing_mass"][d["mask"]], outside[d["mask"]], atol=1e-6, rtol=0)
        # KL(p restricted to the top 50, renormalised || p) = -log p(top 50)
        torch.testing.assert_close(d["kl"][d["mask"]], -torch.log1p(-outside[d["mask"]]), atol=1e-6, rtol=0)
        # every token generate drew lies in the top 50 (the check's support is generate's)
        assert torch.isin(d["response_ids"], top.flatten()).all()
        assert (d["response_ids"][..., None] == top).any(-1).all()
        expected.append(outside[d["mask"]])
    expected = torch.cat(expected)
    assert r.missing_mass == pytest.approx(expected.mean().item(), abs=1e-7)
    assert r.missing_mass > 0.4  # near-flat law over 128 tokens: most of the mass is outside the top 50
    assert r.kl == pytest.approx((-torch.log1p(-expected)).mean().item(), abs=1e-7)
    assert r.outside_support == 0 and r.zero_mass_share == 0.0
    assert any("pass top_k=0" in reason for reason in r.reasons)


def test_top_k_zero_passes(flat):
    r = check_on_policy(flat, PROMPTS, n=6, max_new_tokens=5, top_k=0)
    assert r.ok and r.verdict == "ok" and r.reasons == []
    assert r.missing_mass == 0.0 and r.max_missing_mass == 0.0  # no token is out of the sampler's reach
    assert r.max_kl < 1e-9  # same law on both sides: KL is 0 up to float round-off
    assert "on-policy check: OK" in str(r)


def test_temperature_mismatch_is_flagged_with_the_kl_of_the_two_laws():
    model = tiny_gpt2(init=0.3)  # spread-out next-token laws so the temperature matters
    r = check_on_policy(model, PROMPTS, n=4, max_new_tokens=4, temperature=0.7, top_k=0,
                        logprob_fn=full_softmax_logprobs)  # per-token function: the check probes it
    assert not r.ok
    kls = []
    for d in r.draws:
        logits = step_logits(model, d)
        kl = torch.distributions.kl_divergence(torch.distributions.Categorical(logits=logits / 0.7),
                                               torch.distributions.Categorical(logits=logits))
        torch.testing.assert_close(d["kl"][d["mask"]], kl[d["mask"]], atol=1e-6, rtol=1e-6)
        kls.append(kl[d["mask"]])
    assert r.kl == pytest.approx(torch.cat(kls).mean().item(), rel=1e-6)
    assert r.kl > 0.01 and r.missing_mass == 0.0
    assert any("KL(sampler || loss)" in reason for reason in r.reasons)
    # the same function at the sampler's temperature is on-policy
    at_07 = check_on_policy(model, PROMPTS, n=4, max_new_tokens=4, temperature=0.7, top_k=0,
                            logprob_fn=lambda m, i, y: _tempered(m, i, y, 0.7))
    assert at_07.ok and at_07.max_kl < 1e-6


def _tempered(model, input_ids, response_ids, temperature):
    P = input_ids.shape[1]
    logits = model(torch.cat([input_ids, response_ids], 1)).logits[:, P - 1:-1]
    return torch.log_softmax(logits / temperature, -1).gather(-1, response_ids[..., None])[..., 0]


def test_top_p_mismatch_is_flagged_with_the_mass_outside_the_nucleus():
    model = tiny_gpt2(init=0.3)
    r = check_on_policy(model, PROMPTS, n=4, max_new_tokens=4, top_k=0, top_p=0.8)
    assert not r.ok
    for d in r.draws:
        p = torch.softmax(step_logits(model, d), -1).numpy()
        mask = d["mask"].numpy()
        for i, t in zip(*np.nonzero(mask)):
            s = np.sort(p[i, t])[::-1]
            before = np.cumsum(s) - s  # mass of the strictly more likely tokens (Holtzman et al. 2020)
            outside = s[before >= 0.8].sum()
            assert d["missing_mass"][i, t].item() == pytest.approx(outside, abs=1e-6)
    assert 0.1 < r.missing_mass < 0.3  # the nucleus holds >= 0.8 of the mass, minus one token at most
    assert r.outside_support == 0


def test_loss_truncated_like_the_sampler_is_on_policy_and_a_full_table_is_accepted(flat):
    def top50_table(model, input_ids, response_ids):  # (n, T, V): the truncated policy's log-probs
        P = input_ids.shape[1]
        logits = model(torch.cat([input_ids, response_ids], 1)).logits[:, P - 1:-1]
        keep = torch.zeros_like(logits, dtype=torch.bool).scatter(-1, torch.topk(logits, 50, -1).indices, True)
        return torch.log_softmax(logits.masked_fill(~keep, float("-inf")), -1)

    r = check_on_policy(flat, PROMPTS, n=4, max_new_tokens=4, logprob_fn=top50_table)
    assert r.ok and r.missing_mass == 0.0 and r.max_kl < 1e-6


def test_loss_that_excludes_drawn_tokens_gives_infinite_kl_and_zero_mass_draws(flat):
    def top50_table(model, input_ids, response_ids):
        P = input_ids.shape[1]
        logits = model(torch.cat([input_ids, response_ids], 1)).logits[:, P - 1:-1]
        keep = torch.zeros_like(logits, dtype=torch.bool).scatter(-1, torch.topk(logits, 50, -1).indices, True)
        return torch.log_softmax(logits.masked_fill(~keep, float("-inf")), -1)

    r = check_on_policy(flat, PROMPTS, n=6, max_new_tokens=4, top_k=0, logprob_fn=top50_table)
    assert not r.ok and math.isinf(r.kl)
    outside = torch.cat([(~(d["response_ids"][..., None] == torch.topk(step_logits(flat, d), 50, -1).indices).any(-1))
                         [d["mask"]] for d in r.draws])  # drawn tokens outside the top 50 (torch.topk)
    assert outside.sum() > 0
    assert r.zero_mass_share == pytest.approx(outside.double().mean().item(), abs=1e-12)


def test_sample_fn_is_checked_against_its_stated_settings(flat):
    def multinomial(model, input_ids, steps=4):  # plain softmax sampling at temperature 1, by hand
        ids = input_ids
        for _ in range(steps):
            p = torch.softmax(model(ids).logits[:, -1], -1)
            ids = torch.cat([ids, torch.multinomial(p, 1)], 1)
        return ids

    assert check_on_policy(flat, PROMPTS, n=6, sample_fn=multinomial).ok
    # stated top_k=5, but the sampler draws from the whole vocabulary: draws fall outside the stated support
    wrong = check_on_policy(flat, PROMPTS, n=6, sample_fn=multinomial, top_k=5)
    assert wrong.outside_support > 0 and not wrong.ok
    assert any("outside the support" in reason for reason in wrong.reasons)


def _wrapped_generate(model, input_ids):  # a user's sampler that calls generate without top_k: keeps 50
    return model.generate(input_ids, attention_mask=torch.ones_like(input_ids), do_sample=True, max_new_tokens=3,
                          pad_token_id=0)


def _multinomial(model, input_ids, steps=3):
    ids = input_ids
    for _ in range(steps):
        ids = torch.cat([ids, torch.multinomial(torch.softmax(model(ids).logits[:, -1], -1), 1)], 1)
    return ids


def test_support_draws_catch_a_sampler_narrower_than_its_stated_settings(flat):
    # stated: nothing (plain softmax); real: generate's top 50. The drawn tokens all lie in the stated
    # support, so only the empirical first-step test can see it.
    blind = check_on_policy(flat, PROMPTS, n=4, sample_fn=_wrapped_generate)
    assert blind.ok and blind.first_step is None
    m = 256
    r = check_on_policy(flat, PROMPTS, n=4, sample_fn=_wrapped_generate, support_draws=m)
    assert not r.ok and r.first_step["flagged"] == 2 and r.outside_support == 0
    assert any("narrower than" in reason for reason in r.reasons)
    unseen, expected = [], []
    for d, prompt in zip(r.draws, PROMPTS):
        with torch.no_grad():
            logits = flat(torch.tensor([prompt])).logits[0, -1].double()
        p = torch.softmax(logits, -1).numpy()
        outside_top50 = 1.0 - p[torch.topk(logits, 50).indices.numpy()].sum()
        f = d["first_step"]
        # a token outside the top 50 is never drawn: the undrawn loss mass is at least the mass outside them
        assert f["unseen_loss_mass"] >= outside_top50 - 1e-6 and outside_top50 > 0.5
        # had the sampler followed q = p, token v is missed by all m draws with probability (1 - p_v)^m
        assert f["expected"] == pytest.approx(float(np.sum(p * (1.0 - p) ** m)), rel=1e-9)
        unseen.append(f["unseen_loss_mass"])
        expected.append(f["expected"])
    assert r.first_step["unseen_loss_mass"] == pytest.approx(np.mean(unseen))
    assert r.first_step["expected"] == pytest.approx(np.mean(expected)) and 0.05 < r.first_step["expected"] < 0.3
    # a sampler that does follow its stated law passes the same test
    honest = check_on_policy(flat, PROMPTS, n=4, sample_fn=_multinomial, support_draws=m)
    assert honest.ok and honest.first_step["flagged"] == 0
    assert abs(honest.first_step["unseen_loss_mass"] - honest.first_step["expected"]) < 4 * honest.first_step["sd_bound"]


def test_report_table_dict_and_state(flat):
    flat.train()
    rng = torch.get_rng_state()
    r = check_on_policy(flat, "abc", tokenizer=type("Tok", (), {"encode": staticmethod(lambda s: [ord(c) % V for c in s])}),
                        n=3, max_new_tokens=3)
    assert flat.training  # mode restored
    flat.eval()
    assert torch.equal(torch.get_rng_state(), rng)  # global RNG untouched
    assert torch.equal(r.draws[0]["input_ids"][0], torch.tensor([97, 98, 99]))
    d = r.to_dict()
    json.dumps(d)  # plain numbers and strings
    assert d["verdict"] == "off-policy" and d["steps"] == r.steps == sum(row["draws"] for row in d["per_step"])
    text = str(r)
    assert "missing mass" in text and "KL(sampler||loss)" in text and f"{r.missing_mass:.4f}" in text
    assert isinstance(r, OnPolicyReport)
    # the same seed draws the same batch
    again = check_on_policy(flat, "abc", tokenizer=type("Tok", (), {"encode": staticmethod(lambda s: [ord(c) % V for c in s])}),
                            n=3, max_new_tokens=3)
    assert torch.equal(again.draws[0]["response_ids"], r.draws[0]["response_ids"])


def test_prompts_from_a_tokenizer_trained_on_the_spot(flat):
    from tokenizers import Tokenizer, models, pre_tokenizers

    tok = Tokenizer(models.WordLevel({"[UNK]": 1, "add": 7, "two": 8, "numbers": 9}, unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    r = check_on_policy(flat, ["add two numbers", "two"], tokenizer=tok, n=2, max_new_tokens=2, top_k=0)
    assert [d["input_ids"][0].tolist() for d in r.draws] == [[7, 8, 9], [8]]  # Encoding.ids, as WordLevel maps them
    assert r.ok


# ---------------------------------------------------------------- bad input


def _bad_len(model, input_ids):
    return input_ids


def _nan_lp(model, input_ids, response_ids):
    return torch.full(response_ids.shape, float("nan"))


def _pos_lp(model, input_ids, response_ids):
    return torch.ones(response_ids.shape)


def _shape_lp(model, input_ids, response_ids):
    return torch.zeros(response_ids.shape[0], response_ids.shape[1] + 1)


@pytest.mark.parametrize("kwargs, exc, match", [
    ({"n": 0}, ValueError, r"n must be >= 1, got n=0"),
    ({"max_new_tokens": 0}, ValueError, r"max_new_tokens must be >= 1"),
    ({"temperature": -1.0}, ValueError, r"temperature must be a finite number > 0, got temperature=-1.0"),
    ({"top_k": -1}, ValueError, r"top_k must be >= 0, got top_k=-1"),
    ({"top_k": 1.5}, TypeError, r"top_k must be an int"),
    ({"top_p": 0.0}, ValueError, r"top_p must be in \(0, 1\], got top_p=0.0"),
    ({"prompts": "abc"}, ValueError, r"prompts\[0\] is a string: pass tokenizer"),
    ({"prompts": []}, ValueError, r"prompts must be a non-empty list"),
    ({"prompts": [[1, 2], []]}, ValueError, r"prompts\[1\] has no tokens"),
    ({"prompts": [[1, 2.5]]}, TypeError, r"prompts\[0\] must be a string or a list of int token ids"),
    ({"sample_fn": 3}, TypeError, r"sample_fn must be callable"),
    ({"sample_fn": _bad_len}, ValueError, r"sample_fn must return \(n, P \+ T\) ids .* input_ids of shape \(2, 2\); got shape \(2, 2\)"),
    ({"logprob_fn": "x"}, TypeError, r"logprob_fn must be callable"),
    ({"logprob_fn": _nan_lp}, ValueError, r"logprob_fn returned 4 NaN"),
    ({"logprob_fn": _pos_lp}, ValueError, r"logprob_fn must return log-probs \(<= 0\), got a maximum of 1"),
    ({"logprob_fn": _shape_lp}, ValueError, r"logprob_fn must return log-probs of shape \(2, 2\) or \(2, 2, 128\) .* got \(2, 3\)"),
    ({"max_missing_mass": 2.0}, ValueError, r"max_missing_mass must be in \[0, 1\]"),
    ({"sample_fn": _multinomial, "max_new_tokens": 3}, ValueError, r"max_new_tokens=3 cannot take effect with sample_fn"),
    ({"probe_batch": 64}, ValueError, r"probe_batch=64 cannot take effect without logprob_fn"),
    ({"tokenizer": object()}, ValueError, r"tokenizer cannot take effect: prompts are token ids"),
    ({"prompts": ["ab"], "tokenizer": object()}, TypeError, r"tokenizer must have an encode method"),
    ({"support_draws": -1}, ValueError, r"support_draws must be >= 0, got support_draws=-1"),
])
def test_bad_input_names_the_argument(flat, kwargs, exc, match):
    args = {"prompts": [[1, 2]], "n": 2, "top_k": 0, **({} if "sample_fn" in kwargs else {"max_new_tokens": 2}), **kwargs}
    prompts = args.pop("prompts")
    with pytest.raises(exc, match=match):
        check_on_policy(flat, prompts, **args)


def test_bad_model_and_unmodelled_generation_settings(flat):
    with pytest.raises(TypeError, match="model must be a callable causal LM"):
        check_on_policy("gpt2", [[1]])
    model = tiny_gpt2()
    model.generation_config.repetition_penalty = 1.3
    with pytest.raises(ValueError, match=r"generation_config sets repetition_penalty=1.3"):
        check_on_policy(model, [[1]], top_k=0)


def test_doc_section_shows_the_top_k_trap_and_its_fix():
    import contextlib
    import io
    import pathlib
    import re

    text = (pathlib.Path(__file__).resolve().parents[1] / "docs" / "objectives.md").read_text()
    section = text[text.index("## Is my loop on-policy?"):]
    section = section[:section.index("\n## ", 5)]
    (block,) = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    ns, out = {}, io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(block, "docs/objectives.md", "exec"), ns)
    trap, fixed = ns["trap"], ns["fixed"]
    assert not trap.ok and trap.settings["top_k"] == 50 and fixed.ok and fixed.missing_mass == 0.0
    # the numbers the prose quotes, and KL = -log(1 - missing mass) per step for a top-k restriction
    assert f"{trap.missing_mass:.0%}" == "71%" and f"{trap.kl:.2f}" == "1.24"
    assert "71% of the loss's probability" in section and "1.24 nats" in section
    steps = torch.cat([d["missing_mass"][d["mask"]] for d in trap.draws])
    assert trap.kl == pytest.approx((-torch.log1p(-steps)).mean().item(), abs=1e-6)
    assert "on-policy check: OFF-POLICY" in out.getvalue() and "with top_k=0: ok, missing mass 0.0000" in out.getvalue()
