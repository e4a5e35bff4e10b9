"""Tests of bonft.generation.sampling: the decoding loop and the training forward pass.

References used below:
- exact next-token law softmax(logits / T) of a model whose logits are a fixed
  table (computed here with numpy), compared with empirical frequencies by
  Pearson's chi-square test (scipy.stats.chisquare);
- top-p (nucleus) truncation as defined by Holtzman et al. 2020, "The Curious
  Case of Neural Text Degeneration": keep the smallest set of most likely
  tokens whose mass reaches p, renormalise;
- the geometric law of the stopping time when EOS has a fixed probability per step.
"""
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from scipy import stats

from bonft.generation import Samples, encode_responses, sample, sequence_logprobs
from bonft.tasks.tokenizer import BOS_ID, EOS_ID, PAD_ID, build_tokenizer, char_vocab
from bonft.trainer.models import build_tiny_model

TOK = build_tokenizer()
V = TOK.vocab_size


pytestmark = pytest.mark.usefixtures("one_thread")
CH = char_vocab()


class TableLM(torch.nn.Module):
    """A causal LM whose next-token logits depend only on the last token: logits = table[last token].

    Exposes the interface the sampler needs (input_ids, attention_mask,
    position_ids, past_key_values, use_cache -> .logits, .past_key_values)."""

    def __init__(self, table):
        super().__init__()
        self.table = torch.nn.Parameter(torch.as_tensor(table, dtype=torch.float32), requires_grad=False)
        self.calls = 0

    def forward(self, input_ids, attention_mask=None, position_ids=None, past_key_values=None, use_cache=None):
        self.calls += 1
        return SimpleNamespace(logits=self.table[input_ids], past_key_values=())


def _table(rows: dict[int, dict[int, float]]):
    t = np.full((V, V), -1e9, dtype=np.float64)
    t[:, EOS_ID] = 0.0  # any other context: stop
    for ctx, row in rows.items():
        t[ctx, :] = -1e9
        for tok, logit in row.items():
            t[ctx, tok] = logit
    return t


def _softmax(x):
    e = np.exp(x - x.max())
    return e / e.sum()


FIRST = {CH["a"]: 1.0, CH["b"]: 0.3, CH["c"]: -0.5, CH["d"]: -1.2, CH["e"]: 0.0}


@pytest.mark.parametrize("temperature", [1.0, 0.5, 2.0])
@pytest.mark.parametrize("batch_size", [None, 1000])
def test_first_token_matches_exact_softmax(temperature, batch_size):
    model = TableLM(_table({BOS_ID: FIRST}))
    toks = list(FIRST)
    p = _softmax(np.array([FIRST[t] for t in toks]) / temperature)  # exact softmax(logits / T)
    s = sample(model, TOK, [""] , n=6000, temperature=temperature, max_new_tokens=1, seed=3, batch_size=batch_size)
    first = s.response_tokens[0, :, 0].numpy()
    counts = np.array([(first == t).sum() for t in toks])
    assert counts.sum() == 6000  # nothing outside the support
    # Pearson chi-square goodness of fit (scipy.stats.chisquare), 4 d.o.f.
    assert stats.chisquare(counts, 6000 * p).pvalue > 1e-3
    # the recorded log-prob of each drawn token is the exact log softmax(logits / T)
    lp = s.token_logprobs[0, :, 0].numpy()
    exact = {t: np.log(pi) for t, pi in zip(toks, p)}
    np.testing.assert_allclose(lp, [exact[t] for t in first], atol=1e-5)


def test_two_step_sequences_match_product_law():
    # a Markov table: law of the pair (y1, y2) is p(y1 | bos) * p(y2 | y1)
    a, b = CH["a"], CH["b"]
    # TableLM conditions on the last token only: the prompt "q" ends in 'q', whose row starts the chain
    model = TableLM(_table({CH["q"]: {a: 0.5, b: 0.0}, a: {a: -1.0, b: 1.0}, b: {a: 0.2, EOS_ID: 0.0}}))
    s = sample(model, TOK, ["q"], n=8000, temperature=0.8, max_new_tokens=2, seed=11)
    p1 = _softmax(np.array([0.5, 0.0]) / 0.8)
    pa = _softmax(np.array([-1.0, 1.0]) / 0.8)
    pb = _softmax(np.array([0.2, 0.0]) / 0.8)
    cells = {(a, a): p1[0] * pa[0], (a, b): p1[0] * pa[1], (b, a): p1[1] * pb[0], (b, EOS_ID): p1[1] * pb[1]}
    pairs = [tuple(r) for r in s.response_tokens[0].tolist()]
    counts = np.array([pairs.count(c) for c in cells])
    assert counts.sum() == 8000
    assert stats.chisquare(counts, 8000 * np.array(list(cells.values()))).pvalue > 1e-3  # scipy chi-square
    # the whole-sequence log-prob is log p(y1) + log p(y2 | y1)
    seq_lp = s.sequence_logprob()[0].numpy()
    exact = {c: np.log(v) for c, v in cells.items()}
    np.testing.assert_allclose(seq_lp, [exact[c] for c in pairs], atol=1e-5)


def test_top_p_truncates_and_renormalises():
    # probabilities 0.5, 0.25, 0.15, 0.07, 0.03: with p = 0.8 the nucleus is the first three
    # (0.5 + 0.25 < 0.8 <= 0.5 + 0.25 + 0.15), renormalised by 0.9 (Holtzman et al. 2020)
    probs = np.array([0.5, 0.25, 0.15, 0.07, 0.03])
    toks = [CH[c] for c in "vwxyz"]
    model = TableLM(_table({BOS_ID: dict(zip(toks, np.log(probs)))}))
    s = sample(model, TOK, [""], n=6000, top_p=0.8, max_new_tokens=1, seed=5)
    first = s.response_tokens[0, :, 0].numpy()
    counts = np.array([(first == t).sum() for t in toks])
    assert counts[3] == 0 and counts[4] == 0
    q = probs[:3] / probs[:3].sum()
    assert stats.chisquare(counts[:3], 6000 * q).pvalue > 1e-3  # scipy chi-square
    np.testing.assert_allclose(s.token_logprobs[0, :, 0].numpy(), np.log(q)[[toks.index(t) for t in first]], atol=1e-5)
    # the training pass with the same top_p gives the same renormalised log-probs
    lp = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid, top_p=0.8)
    torch.testing.assert_close(lp, s.token_logprobs, atol=1e-5, rtol=0)


def test_eos_stop_lengths_are_geometric_and_masks_are_right():
    # after every 'a' the model says 'a' or EOS with probability 1/2 each: P(len = L) = 2^-L
    a = CH["a"]
    model = TableLM(_table({BOS_ID: {a: 0.0, EOS_ID: 0.0}, a: {a: 0.0, EOS_ID: 0.0}}))
    s = sample(model, TOK, [""], n=4000, max_new_tokens=6, seed=2)
    ids, mask = s.response_tokens[0], s.response_valid[0]
    L = mask.sum(-1)
    for row, m, ell, text in zip(ids.tolist(), mask.tolist(), L.tolist(), s.texts[0]):
        assert m == [1] * ell + [0] * (len(m) - ell)  # ones, then zeros
        assert all(t == PAD_ID for t in row[ell:])  # pad after the end
        ends_with_eos = row[ell - 1] == EOS_ID
        assert ends_with_eos or ell == 6  # stopped at EOS or at the cap
        assert text == "a" * (ell - 1 if ends_with_eos else ell)  # EOS not in the text
    assert (s.token_logprobs[0][mask == 0] == 0).all()
    expected = np.array([2.0 ** -k for k in range(1, 6)] + [2.0 ** -5])  # lengths 1..5, and 6 (cap)
    counts = np.array([(L == k).sum().item() for k in range(1, 7)])
    assert stats.chisquare(counts, 4000 * expected).pvalue > 1e-3  # geometric law, scipy chi-square


def test_loop_stops_when_every_row_is_done():
    model = TableLM(_table({BOS_ID: {EOS_ID: 0.0}}))
    s = sample(model, TOK, ["", ""], n=3, max_new_tokens=20, seed=0)
    assert s.response_tokens.shape == (2, 3, 1) and model.calls == 1
    assert s.texts == [["", "", ""], ["", "", ""]]


# ------------------------------------------------------------ tiny transformers models


def _tiny(arch, eos_boost=0.0):
    model = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, max_positions=64, seed=1,
                             pad_token_id=PAD_ID, eos_token_id=EOS_ID, bos_token_id=BOS_ID)
    if eos_boost:  # make EOS likely so that rows stop at different times: a head with a bias (no hook, so
        # that GPT-2 still qualifies for bonft's own decoding step)
        head = model.get_output_embeddings()
        biased = torch.nn.Linear(head.in_features, head.out_features, bias=True)
        biased.weight = head.weight
        with torch.no_grad():
            biased.bias.zero_()
            biased.bias[EOS_ID] = eos_boost
        model.set_output_embeddings(biased)
    return model


PROMPTS = ["lamps 7 sold 3 ?", "ab", "mugs 12 got 4 sold 9 x2 ?"]


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_shapes_masks_and_texts(arch):
    model = _tiny(arch, eos_boost=3.0)
    s = sample(model, TOK, PROMPTS, n=5, max_new_tokens=12, temperature=1.3, seed=0, batch_size=4)
    assert isinstance(s, Samples) and s.n == 5 and s.temperature == 1.3
    B, n, T = s.response_tokens.shape
    assert (B, n) == (3, 5) and 1 <= T <= 12
    assert s.prompt_tokens.shape == s.prompt_valid.shape == (3, len(PROMPTS[2]) + 1)  # + <bos>
    assert s.prompt_valid.sum(-1).tolist() == [len(p) + 1 for p in PROMPTS]
    assert (s.prompt_valid[:, -1] == 1).all()  # left padding: every prompt ends at the right edge
    m = s.response_valid
    assert ((m[..., 1:] <= m[..., :-1])).all()  # ones then zeros
    assert (s.response_tokens[m == 0] == PAD_ID).all()
    assert (s.token_logprobs[m == 0] == 0).all() and (s.token_logprobs[m == 1] < 0).all()
    eos = (s.response_tokens == EOS_ID) & (m == 1)
    L = m.sum(-1)
    stopped = eos.any(-1)
    assert stopped.float().mean() > 0.5  # the EOS boost makes most rows stop
    last = s.response_tokens.gather(-1, (L - 1).clamp(min=0)[..., None]).squeeze(-1)
    assert (last[stopped] == EOS_ID).all() and (eos.sum(-1) <= 1).all()  # EOS only as the last token
    for b in range(B):
        for j in range(n):
            toks = [t for t in s.response_tokens[b, j, : L[b, j]].tolist() if t != EOS_ID]
            assert s.texts[b][j] == TOK.decode(toks, skip_special_tokens=True)


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_seed_reproducible(arch):
    model = _tiny(arch)
    s1 = sample(model, TOK, PROMPTS, n=4, max_new_tokens=8, seed=7)
    s2 = sample(model, TOK, PROMPTS, n=4, max_new_tokens=8, seed=7)
    s3 = sample(model, TOK, PROMPTS, n=4, max_new_tokens=8, seed=8)
    assert torch.equal(s1.response_tokens, s2.response_tokens) and s1.texts == s2.texts
    assert not torch.equal(s1.response_tokens, s3.response_tokens)


@pytest.mark.parametrize("top_k, top_p, kept", [(2, 1.0, 2), (3, 1.0, 3), (3, 0.7, 2), (9, 1.0, 5), (3, 0.5, 1)])
def test_top_k_keeps_the_k_most_likely_then_the_nucleus(top_k, top_p, kept):
    # top-k sampling (Fan et al. 2018): the k most likely tokens, renormalised; then the top-p nucleus of that
    # renormalised law (Holtzman et al. 2020). Probabilities 0.5, 0.25, 0.15, 0.07, 0.03: with k = 3 the kept
    # law is (0.5, 0.25, 0.15) / 0.9; its nucleus at p = 0.7 is the first two (0.556 < 0.7 <= 0.833); at 0.5
    # the first alone (the most likely token is always kept); k = 9 > 5 tokens keeps all five (worked by hand)
    probs = np.array([0.5, 0.25, 0.15, 0.07, 0.03])
    toks = [CH[c] for c in "vwxyz"]
    model = TableLM(_table({BOS_ID: dict(zip(toks, np.log(probs)))}))
    s = sample(model, TOK, [""], n=6000, top_k=top_k, top_p=top_p, max_new_tokens=1, seed=5)
    assert s.top_k == top_k
    first = s.response_tokens[0, :, 0].numpy()
    counts = np.array([(first == t).sum() for t in toks])
    assert counts[kept:].sum() == 0 and counts[:kept].min() > 0
    q = probs[:kept] / probs[:kept].sum()
    if kept > 1:
        assert stats.chisquare(counts[:kept], 6000 * q).pvalue > 1e-3  # scipy chi-square
    np.testing.assert_allclose(s.token_logprobs[0, :, 0].numpy(), np.log(q)[[toks.index(t) for t in first]], atol=1e-5)
    lp = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid,
                           top_k=top_k, top_p=top_p)  # the training pass scores the same truncated law
    torch.testing.assert_close(lp, s.token_logprobs, atol=1e-5, rtol=0)


def test_top_k_keeps_every_token_tied_with_the_kth():
    # the k-th largest probability is shared by two tokens: both stay (a threshold at the k-th value, as
    # transformers' top-k warper keeps scores >= it; from memory, common practice)
    toks = [CH[c] for c in "vwxy"]
    model = TableLM(_table({BOS_ID: dict(zip(toks, np.log([0.4, 0.2, 0.2, 0.2])))}))
    s = sample(model, TOK, [""], n=3000, top_k=2, max_new_tokens=1, seed=2)
    counts = np.array([(s.response_tokens[0, :, 0].numpy() == t).sum() for t in toks])
    assert stats.chisquare(counts, 3000 * np.array([0.4, 0.2, 0.2, 0.2])).pvalue > 1e-3


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
@pytest.mark.parametrize("top_p, top_k", [(1.0, 0), (0.9, 0), (1.0, 5), (0.9, 5)])
def test_sequence_logprobs_agree_with_sampler(arch, top_p, top_k):
    model = _tiny(arch, eos_boost=2.0)
    s = sample(model, TOK, PROMPTS, n=4, max_new_tokens=10, temperature=0.7, top_p=top_p, top_k=top_k, seed=1)
    model.train()  # no dropout in the tiny models: the mode must not matter
    lp = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid,
                           temperature=0.7, top_p=top_p, top_k=top_k)
    assert lp.shape == s.token_logprobs.shape and lp.requires_grad
    assert (lp - s.token_logprobs).abs().max().item() < 1e-5
    lp.sum().backward()
    grads = [p.grad for p in model.parameters() if p.grad is not None]
    assert grads and all(torch.isfinite(g).all() for g in grads)


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_padding_changes_nothing(arch):
    model = _tiny(arch)
    s = sample(model, TOK, PROMPTS, n=3, max_new_tokens=6, temperature=1.0, seed=4)
    base = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid)
    # extra left padding of prompts and extra right padding of responses
    pid = torch.cat([torch.full((3, 5), PAD_ID), s.prompt_tokens], 1)
    pm = torch.cat([torch.zeros(3, 5, dtype=torch.long), s.prompt_valid], 1)
    rid = torch.cat([s.response_tokens, torch.full((3, 3, 4), PAD_ID)], 2)
    rm = torch.cat([s.response_valid, torch.zeros(3, 3, 4, dtype=torch.long)], 2)
    padded = sequence_logprobs(model, pid, pm, rid, rm)
    assert (padded[..., :-4] - base).abs().max().item() < 1e-5 and (padded[..., -4:] == 0).all()
    # each prompt alone (no padding at all) gives the same log-probs as in the padded batch
    for b, p in enumerate(PROMPTS):
        ids = torch.tensor([TOK(p)["input_ids"]])
        alone = sequence_logprobs(model, ids, torch.ones_like(ids), s.response_tokens[b:b + 1], s.response_valid[b:b + 1])
        assert (alone[0] - s.token_logprobs[b]).abs().max().item() < 1e-5


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_padded_prompt_has_the_unpadded_next_token_law(arch):
    model = _tiny(arch)
    short = PROMPTS[1]
    ids = torch.tensor([TOK(short)["input_ids"]])
    with torch.no_grad():
        p = torch.softmax(model(input_ids=ids).logits[0, -1].double(), -1).numpy()  # exact law, unpadded
    # the short prompt sits in a batch with a longer one, so it is left-padded by 23 tokens
    s = sample(model, TOK, [short, PROMPTS[2]], n=2000, max_new_tokens=1, seed=9)
    counts = np.bincount(s.response_tokens[0, :, 0].numpy(), minlength=V)
    big = p * 2000 >= 5  # chi-square needs expected counts >= 5: pool the rest into one cell
    obs, exp = counts[big], p[big] * 2000
    if (~big).any():
        obs, exp = np.append(obs, counts[~big].sum()), np.append(exp, p[~big].sum() * 2000)
    exp = exp * obs.sum() / exp.sum()  # float64 round-off: make the totals equal for scipy
    assert stats.chisquare(obs, exp).pvalue > 1e-3  # scipy chi-square vs the exact softmax


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_one_row_at_a_time_equals_batched_law(arch):
    # with batch_size=1 each row is decoded alone; its recorded log-probs must be those of the
    # unpadded model, as in the batched run (the law of each token given the past is the same)
    model = _tiny(arch, eos_boost=2.0)
    s = sample(model, TOK, PROMPTS, n=2, max_new_tokens=8, seed=3, batch_size=1)
    lp = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid)
    assert (lp - s.token_logprobs).abs().max().item() < 1e-5


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_encode_responses_reproduces_sampled_tokens(arch):
    model = _tiny(arch, eos_boost=3.0)
    s = sample(model, TOK, PROMPTS, n=4, max_new_tokens=10, seed=6)
    stopped = ((s.response_tokens == EOS_ID) & (s.response_valid == 1)).any(-1)  # (B, n)
    pid, pm, rid, rm = encode_responses(TOK, PROMPTS, s.texts)
    assert torch.equal(pid, s.prompt_tokens) and torch.equal(pm, s.prompt_valid)
    lp = sequence_logprobs(model, pid, pm, rid, rm).sum(-1)
    # responses that ended with EOS re-encode to the same tokens, so to the same log-likelihood
    assert (lp[stopped] - s.sequence_logprob()[stopped]).abs().max().item() < 1e-5
    assert stopped.sum() >= 6
    pid, pm, rid, rm = encode_responses(TOK, ["ab"], ["12"])  # one response per prompt
    assert rid.tolist() == [[[TOK.convert_tokens_to_ids("1"), TOK.convert_tokens_to_ids("2"), EOS_ID]]]
    with pytest.raises(ValueError, match=r"same number n >= 1 of responses per prompt \(n=2\), got 1 at index 1"):
        encode_responses(TOK, ["a", "b"], [["x", "y"], ["z"]])


def test_training_mode_is_restored():
    model = _tiny("gpt2")
    model.train()
    sample(model, TOK, ["a"], n=1, max_new_tokens=2, seed=0)
    assert model.training


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
@pytest.mark.parametrize("bad", [float("nan"), float("inf")])
def test_a_model_with_non_finite_logits_is_an_error_not_a_sample(arch, bad):
    # a NaN (or +inf) logit makes the row's cumulative mass NaN: searchsorted then returns V, which a clamp
    # turned into the last token with log-prob NaN, and bonft eval printed a table of such samples
    model = _tiny(arch)
    with torch.no_grad():
        model.get_output_embeddings().weight[5, 0] = bad
    model.train()
    with pytest.raises(ValueError, match=r"the model's next-token log-probs are not finite in 3 of 3 rows \(first: row 0, "
                                         r"sample 0 of prompt 0 of this chunk\): its logits hold NaN or inf"):
        sample(model, TOK, ["ab"], n=3, max_new_tokens=2, seed=0)
    assert model.training  # its mode restored after the error


def test_sampling_builds_no_graph_with_grad_enabled():
    # with autograd on, the returned log-probs must carry no graph (a graph would keep every
    # decoding step's KV cache alive); training log-probs come from sequence_logprobs instead.
    model = _tiny("gpt2")
    assert torch.is_grad_enabled()
    s = sample(model, TOK, ["a", "bb"], n=3, max_new_tokens=4, seed=0)
    assert not s.token_logprobs.requires_grad and s.token_logprobs.grad_fn is None
    lp = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid)
    assert lp.requires_grad  # the training forward still has its gradient
    assert torch.allclose(lp.detach(), s.token_logprobs, atol=1e-5)


def _gqa_llama():
    """A llama with 2 key/value heads for 4 query heads (grouped-query attention)."""
    from transformers import LlamaConfig, LlamaForCausalLM

    torch.manual_seed(2)
    cfg = LlamaConfig(vocab_size=V, hidden_size=32, intermediate_size=64, num_hidden_layers=2, num_attention_heads=4,
                      num_key_value_heads=2, max_position_embeddings=64, pad_token_id=PAD_ID, eos_token_id=EOS_ID,
                      bos_token_id=BOS_ID, attn_implementation="sdpa")
    return LlamaForCausalLM(cfg).eval()


def _paths(monkeypatch):
    """Switches between the four ways the sampler can decode; all must draw the same.

    own: bonft's decoding step (stock GPT-2 and Llama) on the shared-prompt cache; shared: the model's own
    forward calling the shared-prompt attention through the registry; reserved: the prompt cache copied
    to the n rows with room reserved; stock: transformers' cache grown by torch.cat.
    """
    def counted(*args):  # the real step, counting its calls in use.steps
        step = _FOR_MODEL(*args)
        return step and (lambda *a: use.steps.append(1) or step(*a))

    def use(path):
        monkeypatch.setattr(_pa, "supported", _SUPPORTED if path in ("own", "shared") else (lambda m, p: False))
        monkeypatch.setattr(_kv, "_DynamicLayer", None if path == "stock" else _DYNAMIC)
        monkeypatch.setattr(_ds, "for_model", counted if path == "own" else (lambda *a: None))
    use.steps = []
    return use


import bonft.generation.decode_step as _ds  # noqa: E402
import bonft.generation.kvcache as _kv  # noqa: E402
import bonft.generation.prefix_attention as _pa  # noqa: E402

_SUPPORTED, _DYNAMIC, _FOR_MODEL = _pa.supported, _kv._DynamicLayer, _ds.for_model


@pytest.mark.parametrize("arch", ["gpt2", "llama", "llama-gqa"])
def test_kv_cache_paths_draw_the_same(arch, monkeypatch):
    # bonft's own decoding step, the shared-prompt cache (one copy of each prompt for its n rows,
    # _prefix_attn) under the model's own forward, the reserved cache and transformers' stock cache grown
    # by torch.cat are speed changes only: same seed -> same tokens, log-probs equal to float32 round-off,
    # across prompts of different lengths (left padding), EOS, chunks and top-p.
    model = _gqa_llama() if arch == "llama-gqa" else _tiny(arch.split("-")[0], eos_boost=1.5)
    monkeypatch.setattr(_pa, "_FIRST_CAPACITY", 2)  # the reply buffer grows 2 -> 4 -> 8 -> max_new_tokens
    checks = []
    monkeypatch.setattr(_pa.decoding, "check", lambda self, f=_pa.decoding.check: checks.append(1) or f(self))
    use = _paths(monkeypatch)
    prompts = ["ab", "c", "dddd", "ef"]
    paths = ("own", "shared", "reserved", "stock")
    out = {}
    for path in paths:
        use(path)
        checks.clear(), use.steps.clear()
        out[path] = [sample(model, TOK, prompts, n=4, max_new_tokens=12, seed=3),
                     sample(model, TOK, prompts, n=3, max_new_tokens=9, top_p=0.8, seeds=[5, 6, 7, 8], batch_size=6)]
        assert (len(checks) > 0) == (path == "shared")  # each path really ran, and only there
        assert (len(use.steps) > 0) == (path == "own")
        assert model.config._attn_implementation == "sdpa"  # switched back after decoding
    for path in paths[1:]:
        for a, b in zip(out[paths[0]], out[path]):
            assert torch.equal(a.response_tokens, b.response_tokens) and torch.equal(a.response_valid, b.response_valid)
            assert torch.allclose(a.token_logprobs, b.token_logprobs, atol=1e-5)
    s = out[paths[0]][0]
    assert s.response_valid.sum(-1).min() < 12  # EOS stopped some rows early
    ref = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid)
    assert torch.allclose(ref, s.token_logprobs, atol=1e-5)


def test_own_decoding_step_only_for_stock_models_without_hooks():
    # bonft's own step replaces the model's forward only where that forward is transformers' own GPT-2
    # or Llama code: another architecture, a subclass, a replaced submodule or a hook (on a module or
    # global) keep the model's forward (common practice: a hook or an adapter must see every call)
    from transformers import GPTNeoXConfig, GPTNeoXForCausalLM
    from transformers.models.gpt2.modeling_gpt2 import GPT2LMHeadModel

    def step_for(model):
        ids, mask = torch.tensor([[1, 4, 5]]), torch.ones(1, 3, dtype=torch.long)
        past = model(input_ids=ids, attention_mask=mask, use_cache=True).past_key_values
        return _ds.for_model(model, past, _pa.install(past, mask, 2, 4))

    assert step_for(_tiny("gpt2")) is not None and step_for(_tiny("llama")) is not None
    neox = GPTNeoXForCausalLM(GPTNeoXConfig(vocab_size=V, hidden_size=32, num_hidden_layers=1, num_attention_heads=2,
                                            intermediate_size=64, max_position_embeddings=64)).eval()
    assert step_for(neox) is None
    model = _tiny("gpt2")
    handle = model.transformer.h[0].mlp.register_forward_pre_hook(lambda *a: None)
    assert step_for(model) is None
    handle.remove()
    handle = torch.nn.modules.module.register_module_forward_hook(lambda *a: None)
    try:
        assert step_for(model) is None
    finally:
        handle.remove()
    assert step_for(model) is not None

    class Mine(GPT2LMHeadModel):
        pass
    assert step_for(Mine(model.config).eval()) is None
    model.transformer.h[0].mlp.c_fc = torch.nn.Sequential(model.transformer.h[0].mlp.c_fc)  # an adapter-like wrapper
    assert step_for(model) is None
    model = _tiny("gpt2")
    model.config.reorder_and_upcast_attn = True
    assert step_for(model) is None
    model = _tiny("llama")
    model.model.layers[0].mlp.act_fn = torch.nn.Sequential(model.model.layers[0].mlp.act_fn)
    assert step_for(model) is None


def test_own_tanh_gelu_is_the_published_formula():
    # Hendrycks and Gimpel 2016, "Gaussian Error Linear Units", eq. for the tanh approximation:
    # 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3))), evaluated here in float64 with numpy
    x = torch.randn(100_000, generator=torch.Generator().manual_seed(0)) * 3
    xd = x.double().numpy()
    ref = 0.5 * xd * (1 + np.tanh(np.sqrt(2 / np.pi) * (xd + 0.044715 * xd ** 3)))
    got = _ds._gelu_tanh(x.clone()).double().numpy()
    assert np.abs(got - ref).max() < 2e-6  # float32 round-off on values up to |x| ~ 15


@pytest.mark.parametrize("activation", ["gelu_new", "gelu_pytorch_tanh", "relu", "gelu"])
def test_own_decoding_step_draws_what_the_model_forward_draws(activation, monkeypatch):
    # the tanh GELUs run as x * sigmoid(2 z) (the same function, Hendrycks and Gimpel 2016, in fewer
    # passes); other activations run the model's own module. Either way: same tokens, log-probs to
    # float32 round-off, on a wider model than _tiny (4 heads, 2 layers)
    torch.manual_seed(5)
    model = build_tiny_model("gpt2", vocab_size=V, layers=2, width=64, heads=4, max_positions=64, seed=3,
                             pad_token_id=PAD_ID, eos_token_id=EOS_ID, bos_token_id=BOS_ID)
    model.config.activation_function = activation
    from transformers.activations import ACT2FN
    for block in model.transformer.h:
        block.mlp.act = ACT2FN[activation]
    use = _paths(monkeypatch)
    out = {}
    for path in ("own", "shared"):
        use(path)
        out[path] = sample(model, TOK, PROMPTS, n=6, max_new_tokens=16, temperature=1.5, seed=2)
    assert use.steps
    assert torch.equal(out["own"].response_tokens, out["shared"].response_tokens)
    torch.testing.assert_close(out["own"].token_logprobs, out["shared"].token_logprobs, atol=1e-5, rtol=0)


def test_shared_prompt_cache_only_for_cpu_transformers_models_with_stock_layers():
    # measured on the CPU only; other devices, other attention implementations and other cache kinds keep
    # the copied cache
    model = _tiny("gpt2")
    ids, mask = torch.tensor([[1, 4, 5]]), torch.ones(1, 3, dtype=torch.long)
    past = model(input_ids=ids, attention_mask=mask, use_cache=True).past_key_values
    assert _pa.supported(model, past)
    assert not _pa.supported(torch.nn.Linear(2, 2), past)  # no transformers config
    model.config._attn_implementation = "flex_attention"
    assert not _pa.supported(model, past)
    model.config._attn_implementation = "sdpa"
    layer = past.layers[0]
    layer.keys = layer.keys.to("meta")
    assert not _pa.supported(model, past)


def test_model_that_bypasses_the_attention_registry_falls_back(monkeypatch):
    # A model whose attention layers do not follow model.config (here: each keeps a private copy) never
    # calls the shared-prompt attention; the first check sees it, the chunk is redone on the stock cache
    # from the same random state, and the draw equals the stock path's.
    import copy

    model = _tiny("gpt2")
    for block in model.transformer.h:
        block.attn.config = copy.copy(model.config)
    use = _paths(monkeypatch)
    use("shared")  # the model's own forward (bonft's own GPT-2 step would not read the attention config)
    fallbacks = []
    real = _kv.prompt_pass
    monkeypatch.setattr(_kv, "prompt_pass", lambda *a, **k: fallbacks.append(1) or real(*a, **k))
    a = sample(model, TOK, ["ab", "c"], n=3, max_new_tokens=8, seed=4)
    b = sample(model, TOK, ["ab", "c"], n=3, max_new_tokens=8, seed=4, batch_size=3)  # two chunks, two redos
    assert len(fallbacks) == 3
    use("stock")
    c = sample(model, TOK, ["ab", "c"], n=3, max_new_tokens=8, seed=4)
    d = sample(model, TOK, ["ab", "c"], n=3, max_new_tokens=8, seed=4, batch_size=3)
    assert torch.equal(a.response_tokens, c.response_tokens) and torch.equal(b.response_tokens, d.response_tokens)
    assert torch.allclose(a.token_logprobs, c.token_logprobs, atol=1e-5)
    assert model.config._attn_implementation == "sdpa" and not _pa._switched


def test_attention_implementation_restored_when_decoding_fails():
    model = _tiny("gpt2")
    calls = []

    def fail_on_third(_mod, _inp, _out):
        calls.append(1)
        if len(calls) == 3:
            raise KeyboardInterrupt

    handle = model.transformer.register_forward_hook(fail_on_third)
    with pytest.raises(KeyboardInterrupt):
        sample(model, TOK, ["ab"], n=2, max_new_tokens=8, seed=0)
    handle.remove()
    assert model.config._attn_implementation == "sdpa" and not _pa._switched


def test_two_threads_sampling_one_model_draw_what_one_thread_draws():
    # The attention switch is counted per model and its state is per thread: a second thread decoding
    # on the same model meanwhile (shared path or not) draws exactly what it draws alone.
    import threading

    model = _tiny("gpt2")
    jobs = [(["ab", "c"], 7), (["dddd"], 8), (["e", "ff", "g"], 9)]
    alone = [sample(model, TOK, p, n=5, max_new_tokens=20, seed=s) for p, s in jobs]
    together = [None] * len(jobs)

    def run(i):
        p, s = jobs[i]
        together[i] = sample(model, TOK, p, n=5, max_new_tokens=20, seed=s)

    threads = [threading.Thread(target=run, args=(i,)) for i in range(len(jobs))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for a, b in zip(alone, together):
        assert torch.equal(a.response_tokens, b.response_tokens)
        assert torch.allclose(a.token_logprobs, b.token_logprobs, atol=1e-5)
    assert model.config._attn_implementation == "sdpa" and not _pa._switched


# ------------------------------------------------------------ bad input


def test_bad_input():
    model = _tiny("gpt2")
    with pytest.raises(ValueError, match=r"n must be >= 1, got n=0"):
        sample(model, TOK, ["a"], n=0)
    with pytest.raises(TypeError, match=r"n must be an int, got float"):
        sample(model, TOK, ["a"], n=2.0)
    for t in (0, -1.0, float("nan"), float("inf")):
        with pytest.raises(ValueError, match=r"temperature must be a finite number > 0"):
            sample(model, TOK, ["a"], n=1, temperature=t)
    for p in (0.0, 1.5, -0.1):
        with pytest.raises(ValueError, match=r"top_p must be in \(0, 1\]"):
            sample(model, TOK, ["a"], n=1, top_p=p)
    with pytest.raises(ValueError, match=r"top_k must be >= 0, got top_k=-1"):
        sample(model, TOK, ["a"], n=1, top_k=-1)
    with pytest.raises(TypeError, match=r"top_k must be an int"):
        sample(model, TOK, ["a"], n=1, top_k=2.5)
    with pytest.raises(TypeError, match=r"prompts must be a sequence of str, got a single str"):
        sample(model, TOK, "a", n=1)
    with pytest.raises(ValueError, match=r"prompts must not be empty"):
        sample(model, TOK, [], n=1)
    with pytest.raises(ValueError, match=r"max_new_tokens must be >= 1"):
        sample(model, TOK, ["a"], n=1, max_new_tokens=0)
    with pytest.raises(ValueError, match=r"batch_size must be >= 1"):
        sample(model, TOK, ["a"], n=1, batch_size=0)
    with pytest.raises(ValueError, match=r"max_new_tokens must be <= 62 \(the model has 64 positions and the longest "
                                         r"prompt takes 2 tokens\), got max_new_tokens=63"):
        sample(model, TOK, ["a"], n=1, max_new_tokens=63)
    ids = torch.ones(2, 3, dtype=torch.long)
    r = torch.ones(2, 1, 2, dtype=torch.long)
    with pytest.raises(ValueError, match=r"temperature must be a finite number > 0"):
        sequence_logprobs(model, ids, ids, r, r, temperature=0.0)
    with pytest.raises(TypeError, match=r"response_tokens must be an integer tensor"):
        sequence_logprobs(model, ids, ids, r.float(), r)
    with pytest.raises(ValueError, match=r"response_tokens must have B=2 rows like prompt_tokens, got 1"):
        sequence_logprobs(model, ids, ids, r[:1], r[:1])


@pytest.mark.parametrize("top_p", [1.0, 0.8])
def test_per_prompt_seeds_draw_the_exact_law(top_p):
    # the inverse-CDF draw of sample(..., seeds=...) against the exact (top-p renormalised) softmax
    probs = np.array([0.5, 0.25, 0.15, 0.07, 0.03])
    toks = [CH[c] for c in "vwxyz"]
    model = TableLM(_table({BOS_ID: dict(zip(toks, np.log(probs)))}))
    s = sample(model, TOK, ["", ""], n=3000, top_p=top_p, max_new_tokens=1, seeds=[1, 2])
    first = s.response_tokens[:, :, 0].reshape(-1).numpy()
    counts = np.array([(first == t).sum() for t in toks])
    keep = 3 if top_p < 1 else 5  # Holtzman et al. 2020 nucleus, as in test_top_p_truncates_and_renormalises
    assert counts.sum() == 6000 and counts[keep:].sum() == 0
    q = probs[:keep] / probs[:keep].sum()
    assert stats.chisquare(counts[:keep], 6000 * q).pvalue > 1e-3  # scipy chi-square


def test_one_seed_one_stream_and_the_global_rng():
    # one prompt: seed=s and seeds=[s] take the same uniforms from the same generator -> the same draw;
    # seed=None uses torch's global RNG, so torch.manual_seed makes it reproducible
    model = _tiny("gpt2")
    a = sample(model, TOK, ["ab"], n=6, max_new_tokens=10, seed=4)
    b = sample(model, TOK, ["ab"], n=6, max_new_tokens=10, seeds=[4])
    assert torch.equal(a.response_tokens, b.response_tokens)
    torch.manual_seed(9)
    c = sample(model, TOK, ["ab"], n=6, max_new_tokens=10)
    torch.manual_seed(9)
    d = sample(model, TOK, ["ab"], n=6, max_new_tokens=10)
    assert torch.equal(c.response_tokens, d.response_tokens) and not torch.equal(a.response_tokens, c.response_tokens)


def test_global_rng_draw_matches_exact_softmax():
    # seed=None: the inverse-CDF draw with torch's global RNG against the exact softmax (scipy chi-square)
    model = TableLM(_table({BOS_ID: FIRST}))
    toks = list(FIRST)
    p = _softmax(np.array([FIRST[t] for t in toks]))
    torch.manual_seed(1)
    first = sample(model, TOK, [""], n=6000, max_new_tokens=1).response_tokens[0, :, 0].numpy()
    counts = np.array([(first == t).sum() for t in toks])
    assert counts.sum() == 6000
    assert stats.chisquare(counts, 6000 * p).pvalue > 1e-3


def test_draw_never_picks_a_token_of_zero_mass(monkeypatch):
    # -inf log-probs (top-p's cut) have zero mass: never drawn, whatever the uniform, at the edges
    # u = 2^-53 (the least 1 - torch.rand can be) and u = 1 included; interior uniforms land in the
    # interval of their token (inverse transform sampling; common practice)
    from bonft.generation.policy import draw_tokens

    logp = torch.log(torch.tensor([[0.0, 0.5, 0.0, 0.25, 0.25, 0.0]]))  # mass on tokens 1, 3, 4
    for u, want in ((2.0 ** -53, 1), (0.5, 1), (0.5 + 1e-12, 3), (0.75, 3), (0.75 + 1e-12, 4), (1.0, 4)):
        # draw_tokens takes u = 1 - rand, so rand returns 1 - u
        monkeypatch.setattr(torch, "rand", lambda *a, u=u, **k: 1.0 - torch.full(a, u, dtype=torch.float64))
        assert draw_tokens(logp, None, None, 1).tolist() == [want], u


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_per_prompt_seeds_do_not_depend_on_the_batch(arch):
    # a prompt's samples depend only on its own seed: alone, in a batch, in another order, in chunks
    model = _tiny(arch)
    full = sample(model, TOK, PROMPTS, n=4, max_new_tokens=8, seeds=[10, 11, 12])
    for b, p in enumerate(PROMPTS):
        alone = sample(model, TOK, [p], n=4, max_new_tokens=8, seeds=[10 + b])
        assert alone.texts[0] == full.texts[b]
    rev = sample(model, TOK, PROMPTS[::-1], n=4, max_new_tokens=8, seeds=[12, 11, 10], batch_size=5)
    assert rev.texts[::-1] == full.texts
    other = sample(model, TOK, PROMPTS, n=4, max_new_tokens=8, seeds=[10, 11, 99])
    assert other.texts[:2] == full.texts[:2] and other.texts[2] != full.texts[2]
    with pytest.raises(ValueError, match=r"seeds must hold one seed per prompt \(3 prompts\), got 2 seeds"):
        sample(model, TOK, PROMPTS, n=4, seeds=[1, 2])
    with pytest.raises(ValueError, match="give seed or seeds, not both"):
        sample(model, TOK, PROMPTS, n=4, seed=1, seeds=[1, 2, 3])


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_shared_prompt_pass_equals_the_plain_forward_with_gradients(arch):
    # reference: one plain forward over [prompt ; response] rows (each prompt repeated n times),
    # the definition of the log-probs; the shared-prefix path must match it, gradients included
    model = _tiny(arch)
    s = sample(model, TOK, PROMPTS, n=4, max_new_tokens=6, seed=1)
    lp = sequence_logprobs(model, s.prompt_tokens, s.prompt_valid, s.response_tokens, s.response_valid)
    g = torch.autograd.grad(lp.sum(), list(model.parameters()))
    B, n, T = s.response_tokens.shape
    ids = torch.cat([s.prompt_tokens.repeat_interleave(n, 0), s.response_tokens.reshape(B * n, T)], 1)
    mask = torch.cat([s.prompt_valid.repeat_interleave(n, 0), s.response_valid.reshape(B * n, T)], 1)
    pos = (mask.cumsum(-1) - 1).clamp(min=0)
    logits = model(input_ids=ids, attention_mask=mask, position_ids=pos).logits[:, -(T + 1):-1]
    ref = torch.log_softmax(logits, -1).gather(-1, s.response_tokens.reshape(B * n, T, 1)).squeeze(-1)
    ref = ref.masked_fill(s.response_valid.reshape(B * n, T) == 0, 0.0).view(B, n, T)
    g_ref = torch.autograd.grad(ref.sum(), list(model.parameters()))
    torch.testing.assert_close(lp, ref, atol=1e-5, rtol=0)
    for a, b in zip(g, g_ref):
        torch.testing.assert_close(a, b, atol=1e-4, rtol=1e-4)


# ----------------------------------------------------------------------------- the cache keyword transformers documents
class _Wrapper(torch.nn.Module):
    """A model behind ``forward(*args, **kwargs)``, as DDP (``.module``) and peft (``get_base_model()``) present it."""

    def __init__(self, model, via: str):
        super().__init__()
        self.inner, self.config, self.via = model, model.config, via
        if via == "module":
            self.module = model

    def get_base_model(self):
        return self.inner

    def forward(self, *args, **kwargs):
        return self.inner(*args, **kwargs)


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
@pytest.mark.parametrize("via", [None, "module", "get_base_model"])
def test_sampler_and_training_forward_raise_no_future_warning(arch, via):
    """transformers 5.x deprecates ``past_key_values=`` in favour of ``cache=`` with a FutureWarning
    (transformers.utils.deprecation.deprecate_kwarg); sampling and the training forward use the keyword the
    model's own forward names, through a wrapper too, so they run clean with FutureWarning as an error."""
    import warnings

    model = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, max_positions=64, seed=2,
                             pad_token_id=PAD_ID, eos_token_id=EOS_ID, bos_token_id=BOS_ID)
    if via is not None:
        model = _Wrapper(model, via)
    with warnings.catch_warnings():
        warnings.simplefilter("error", FutureWarning)
        smp = sample(model, TOK, ["ab+c=", "x"], n=3, max_new_tokens=5, seed=4, temperature=1.2)
        lp = sequence_logprobs(model, smp.prompt_tokens, smp.prompt_valid, smp.response_tokens, smp.response_valid,
                               temperature=1.2)
    # the two computations of log pi_T agree to float32 round-off (the sampler's own record is the reference)
    torch.testing.assert_close(lp, smp.token_logprobs, rtol=0, atol=1e-5)
    assert int(smp.response_valid.sum()) >= 6  # every row drew at least one token


def test_padding_and_output_type_are_checked():
    # the last prompt position predicts the first response token: a right-padded prompt would be scored from
    # a pad token (wrong log-probs, no error), so prompts must be left-padded and responses right-padded
    model = _tiny("gpt2")
    ids = torch.tensor([[5, 6, 7], [8, 9, 10]])
    r = torch.ones(2, 2, 3, dtype=torch.long)
    left = torch.tensor([[0, 1, 1], [1, 1, 1]])
    assert sequence_logprobs(model, ids, left, r, r).shape == (2, 2, 3)
    with pytest.raises(ValueError, match=r"prompt_valid must mark left-padded prompts .* got row 0 = \[1, 1, 0\]"):
        sequence_logprobs(model, ids, torch.tensor([[1, 1, 0], [1, 1, 1]]), r, r)
    holes = r.clone()
    holes[1, 0] = torch.tensor([1, 0, 1])
    with pytest.raises(ValueError, match=r"response_valid must mark right-padded responses .* at index \(1, 0, 2\)"):
        sequence_logprobs(model, ids, left, r, holes)

    class TupleOut(torch.nn.Module):  # a forward that returns (logits,) instead of a ModelOutput
        def __init__(self):
            super().__init__()
            self.inner, self.config = model, model.config

        def forward(self, **kw):
            return (self.inner(**kw).logits,)

    with pytest.raises(TypeError, match=r"model must return a transformers ModelOutput with .logits .* got tuple"):
        sequence_logprobs(TupleOut(), ids, left, r, r)


def test_rows_end_at_every_end_token_the_model_names():
    # generate ends a row at any id of generation_config.eos_token_id (an int or a list); sample ends it there
    # too, beside the tokenizer's EOS: a model with an end-of-turn token of its own would otherwise be sampled,
    # scored and credited past the point where it is served
    model = _tiny("gpt2")
    plain = sample(model, TOK, ["ab", "cd"], n=8, max_new_tokens=12, seed=3)
    toks, valid = plain.response_tokens.reshape(16, -1), plain.response_valid.reshape(16, -1)
    drawn = [t for row, m in zip(toks.tolist(), valid.tolist()) for t, v in zip(row, m) if v and t != EOS_ID]
    stop = max(set(drawn), key=drawn.count)  # a token this model draws often
    model.generation_config.eos_token_id = [EOS_ID, stop]
    got = sample(model, TOK, ["ab", "cd"], n=8, max_new_tokens=12, seed=3)
    toks, valid = got.response_tokens.reshape(16, -1), got.response_valid.reshape(16, -1)
    for row, m in zip(toks.tolist(), valid.tolist()):
        kept = [t for t, v in zip(row, m) if v]
        ends = [i for i, t in enumerate(kept) if t in (EOS_ID, stop)]
        assert not ends or ends[0] == len(kept) - 1  # nothing after the first end token
    assert any(row[m.index(0) - 1 if 0 in m else -1] == stop for row, m in zip(toks.tolist(), valid.tolist()))
