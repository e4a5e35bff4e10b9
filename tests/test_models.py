"""Tests of bonft.trainer.models: tiny models built in code, checkpoints, device choice.

References: the GPT-2 parameter count per block, 12 d^2 + 13 d (attention
3d^2+3d and d^2+d, MLP 4d^2+4d and 4d^2+d, two LayerNorms 4d), follows from
the architecture in Radford et al. 2019, "Language Models are Unsupervised
Multitask Learners" (counted here by hand); the Llama block, 4 d^2 (attention,
no biases) + 3 * d * 4d (SwiGLU MLP) + 2d (RMSNorms), from Touvron et al.
2023, "LLaMA: Open and Efficient Foundation Language Models".
"""
import pytest
import torch

from bonft.tasks.tokenizer import BOS_ID, EOS_ID, PAD_ID, build_tokenizer
from bonft.trainer.checkpoint import save_model
from bonft.trainer.models import build_tiny_model, load_model, pick_device

TOK = build_tokenizer()
V = TOK.vocab_size


pytestmark = pytest.mark.usefixtures("one_thread")


def _n_params(model):
    return sum(p.numel() for p in model.parameters())  # tied weights counted once


def test_gpt2_parameter_count_matches_the_architecture():
    d, L, P = 128, 2, 128
    model = build_tiny_model("gpt2", vocab_size=V, layers=L, width=d, max_positions=P)
    # embeddings V*d + positions P*d, L blocks of 12 d^2 + 13 d, final LayerNorm 2d, tied head (Radford et al. 2019)
    assert _n_params(model) == V * d + P * d + L * (12 * d * d + 13 * d) + 2 * d
    assert 0.35e6 < _n_params(model) < 0.45e6  # "0.4 M parameters" for the default size


def test_llama_parameter_count_matches_the_architecture():
    d, L = 64, 3
    model = build_tiny_model("llama", vocab_size=V, layers=L, width=d, heads=4)
    # tied embeddings V*d, L blocks of 4 d^2 + 3 * d * 4d + 2d, final RMSNorm d (Touvron et al. 2023)
    assert _n_params(model) == V * d + L * (4 * d * d + 12 * d * d + 2 * d) + d


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_seeded_init_is_reproducible_and_leaves_global_rng_alone(arch):
    torch.manual_seed(123)
    expected_next = torch.rand(3)
    torch.manual_seed(123)
    a = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, seed=5)
    assert torch.equal(torch.rand(3), expected_next)  # the caller's RNG stream is untouched
    b = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, seed=5)
    c = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, seed=6)
    sa, sb, sc = a.state_dict(), b.state_dict(), c.state_dict()
    assert all(torch.equal(sa[k], sb[k]) for k in sa)
    assert not all(torch.equal(sa[k], sc[k]) for k in sa)


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_checkpoint_round_trip(arch, tmp_path):
    model = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, seed=2,
                             pad_token_id=PAD_ID, eos_token_id=EOS_ID, bos_token_id=BOS_ID)
    ckpt = save_model(model, TOK, tmp_path / "ckpt")
    assert (ckpt / "model" / "config.json").is_file() and (ckpt / "model" / "model.safetensors").is_file()
    assert (ckpt / "tokenizer" / "tokenizer.json").is_file()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left behind
    m2, tok2 = load_model(ckpt, device="cpu")
    ids = torch.tensor([TOK("lamps 7 sold 3 ?")["input_ids"]])
    with torch.no_grad():
        torch.testing.assert_close(m2(input_ids=ids).logits, model(input_ids=ids).logits, atol=0, rtol=0)
    assert tok2("ab")["input_ids"] == TOK("ab")["input_ids"] and tok2.padding_side == "left"
    assert m2.config.eos_token_id == EOS_ID and not m2.training
    # overwrite in place: the new weights replace the old ones
    other = build_tiny_model(arch, vocab_size=V, layers=1, width=32, heads=2, seed=3)
    save_model(other, TOK, ckpt)
    m3, _ = load_model(ckpt, device="cpu")
    with torch.no_grad():
        torch.testing.assert_close(m3(input_ids=ids).logits, other(input_ids=ids).logits, atol=0, rtol=0)


def test_saving_draws_no_transformers_bar_and_restores_the_setting(tmp_path, capfd):
    # `bonft demo --quiet` promises no progress bars; transformers' save_pretrained draws a
    # "Writing model shards" bar of its own unless its bars are off
    from transformers.utils import logging as hf_logging

    model = build_tiny_model("gpt2", vocab_size=V, layers=1, width=32, heads=2, seed=2)
    assert hf_logging.is_progress_bar_enabled()
    save_model(model, TOK, tmp_path / "ckpt")
    assert "Writing model shards" not in capfd.readouterr().err
    assert hf_logging.is_progress_bar_enabled()  # switched back on after the save


def test_saved_weights_get_the_mode_of_any_new_file(tmp_path):
    # transformers writes model.safetensors through a private temporary file (0o600): a checkpoint shared with
    # a group (umask 0o002) or read by another user (0o022) must be readable as its config.json is
    import os

    model = build_tiny_model("gpt2", vocab_size=V, layers=1, width=32, heads=2, seed=2)
    for umask in (0o022, 0o002):
        old = os.umask(umask)
        try:
            ckpt = save_model(model, TOK, tmp_path / f"ckpt{umask:o}")
        finally:
            os.umask(old)
        modes = {f.name: f.stat().st_mode & 0o777 for f in (ckpt / "model").iterdir()}
        assert "model.safetensors" in modes and set(modes.values()) == {0o666 & ~umask}, modes


def test_plain_transformers_directory_loads(tmp_path):
    model = build_tiny_model("gpt2", vocab_size=V, layers=1, width=32, heads=2)
    model.save_pretrained(tmp_path)
    TOK.save_pretrained(tmp_path)
    m2, tok2 = load_model(tmp_path, device=torch.device("cpu"))
    assert type(m2).__name__ == "GPT2LMHeadModel" and tok2.decode(tok2("x y")["input_ids"], skip_special_tokens=True) == "x y"


def test_a_half_precision_model_loads_in_float32_with_a_warning(tmp_path):
    # bfloat16 keeps 8 significant bits (IEEE 754-style layout, 7 stored): 1 + 2^-9 rounds back to 1, so an update
    # 1/512 of a weight is lost in it; bonft upcasts a half-precision model it loads
    import warnings

    from bonft.trainer.models import ModelLoadWarning

    assert torch.tensor(1.0 + 2.0 ** -9, dtype=torch.bfloat16).item() == 1.0
    model = build_tiny_model("llama", vocab_size=V, layers=1, width=32, heads=2).to(torch.bfloat16)
    model.save_pretrained(tmp_path)
    TOK.save_pretrained(tmp_path)
    with pytest.warns(ModelLoadWarning, match=r"weights are saved in bfloat16; bonft loads them as float32"):
        m2, _ = load_model(tmp_path, device=torch.device("cpu"))
    assert {p.dtype for p in m2.parameters()} == {torch.float32}
    for (name, p), q in zip(model.named_parameters(), m2.parameters()):
        assert torch.equal(p.float(), q), name  # the saved values, exactly (bfloat16 -> float32 is exact)
    model.float().save_pretrained(tmp_path / "f32")
    TOK.save_pretrained(tmp_path / "f32")
    with warnings.catch_warnings():
        warnings.simplefilter("error", ModelLoadWarning)  # a float32 model with default settings: no warning
        load_model(tmp_path / "f32", device=torch.device("cpu"))


def test_saved_sampling_settings_that_bonft_does_not_read_are_named(tmp_path):
    from transformers import GenerationConfig

    from bonft.trainer.models import ModelLoadWarning

    model = build_tiny_model("llama", vocab_size=V, layers=1, width=32, heads=2)
    model.generation_config = GenerationConfig(do_sample=True, temperature=0.3, top_k=3, top_p=0.8,
                                               repetition_penalty=1.3, eos_token_id=EOS_ID)
    model.save_pretrained(tmp_path)
    TOK.save_pretrained(tmp_path)
    with pytest.warns(ModelLoadWarning, match=r"generation_config sets temperature=0.3, top_p=0.8, top_k=3, "
                                              r"repetition_penalty=1.3, which bonft does not read"):
        load_model(tmp_path, device=torch.device("cpu"))


def test_text_the_tokenizer_cannot_encode_is_named():
    # bonft's character tokenizer has no backtick or braces: code fences become '<unk>', which a model can never write
    import warnings

    from bonft.trainer.models import UnknownTokenWarning, check_vocabulary

    with pytest.warns(UnknownTokenWarning, match=r"^1 of 2 reference responses hold characters the tokenizer encodes as "
                                                 r"its unknown token '<unk>' \('`' '\{' '\}'; e\.g\. '```python"):
        check_vocabulary(TOK, ["add 2 and 3", "sum xs"], ["5", "```python\ndef f(xs): return {}\n```"])
    with warnings.catch_warnings():
        warnings.simplefilter("error", UnknownTokenWarning)
        check_vocabulary(TOK, ["add 2 and 3"], ["5"])  # all known: silent


def test_pick_device():
    assert pick_device("cpu") == torch.device("cpu")
    assert pick_device("auto") == torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if not torch.cuda.is_available():
        with pytest.raises(ValueError, match=r"device 'cuda' needs a CUDA device"):
            pick_device("cuda")
    with pytest.raises(ValueError, match=r"preference must be one of \('auto', 'cpu', 'cuda'\), got 'gpu'"):
        pick_device("gpu")


def test_bad_input(tmp_path):
    with pytest.raises(ValueError, match=r"arch must be one of \('gpt2', 'llama'\), got 'rnn'"):
        build_tiny_model("rnn", vocab_size=V)
    with pytest.raises(ValueError, match=r"width must be divisible by heads \(heads=3\), got width=128"):
        build_tiny_model("gpt2", vocab_size=V, heads=3)
    with pytest.raises(ValueError, match=r"width / heads must be even"):
        build_tiny_model("llama", vocab_size=V, width=12, heads=4)
    with pytest.raises(ValueError, match=r"eos_token_id must be <= 9, got eos_token_id=10"):
        build_tiny_model("gpt2", vocab_size=10, eos_token_id=10)
    with pytest.raises(TypeError, match=r"vocab_size must be an int, got float"):
        build_tiny_model("gpt2", vocab_size=10.0)
    with pytest.raises(FileNotFoundError, match=r"not a directory"):
        load_model(tmp_path / "missing")
    with pytest.raises(FileNotFoundError, match=r"no config.json"):
        load_model(tmp_path)


def test_load_model_accepts_a_run_directory(tmp_path):
    # a training run directory resolves to its newest checkpoints/step-* (the layout bonft train writes)
    old = build_tiny_model("gpt2", vocab_size=V, layers=1, width=32, heads=2, seed=3)
    new = build_tiny_model("gpt2", vocab_size=V, layers=1, width=32, heads=2, seed=4)
    from bonft.trainer.checkpoint import save_checkpoint

    for step, m in ((2, old), (10, new)):
        save_checkpoint(tmp_path / "run", step=step, model=m, tokenizer=TOK, optimizer=None, config_toml="", keep=5)
    m, _ = load_model(tmp_path / "run", device="cpu")
    sm, sn = m.state_dict(), new.state_dict()
    assert all(torch.equal(sm[k], sn[k]) for k in sn)
    with pytest.raises(FileNotFoundError, match="no checkpoint in"):
        (tmp_path / "empty" / "checkpoints").mkdir(parents=True)
        load_model(tmp_path / "empty", device="cpu")


def test_a_start_from_model_with_dropout_trains_without_it(tmp_path):
    # GPT2Config's defaults put dropout 0.1 on embeddings, attention and residuals: in training mode two
    # forwards of the same text then differ, so the training log-probs would be another policy than the
    # sampler's (which decodes in eval mode). policy_model sets every rate outside a LoRA adapter to 0, says so,
    # and then a training-mode forward equals the eval-mode one
    from transformers import GPT2Config, GPT2LMHeadModel

    from bonft.trainer.config import from_dict
    from bonft.trainer.models import policy_model

    torch.manual_seed(0)
    model = GPT2LMHeadModel(GPT2Config(vocab_size=40, n_positions=16, n_embd=16, n_layer=1, n_head=2,
                                       bos_token_id=0, eos_token_id=1))
    ids = torch.randint(2, 40, (2, 6))
    model.train()
    assert not torch.equal(model(ids).logits, model(ids).logits)  # dropout is active
    (tmp_path / "m").mkdir()
    cfg = from_dict({"start_from": str(tmp_path / "m"), "rl_steps": 1, "run_dir": str(tmp_path / "r")})
    with pytest.warns(UserWarning, match=r"start_from's model has active dropout \(.*p=0.1.*\): set to 0 for training"):
        trained = policy_model(model, cfg)
    trained.train()
    a = trained(ids).logits
    trained.eval()
    torch.testing.assert_close(a, trained(ids).logits, rtol=0, atol=0)
    assert model.config.resid_pdrop == 0.1  # the config (what a checkpoint saves) is untouched
