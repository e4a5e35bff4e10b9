"""Verifiers as users write them: module:function from the working directory, file.py:function with sibling
imports, a local sequence-classification model as a reward model, verifiers by name.

Outside references: the reward model's scores are compared with a direct forward pass of the same
``transformers`` model on each text alone (no padding), and its two-class probabilities with a softmax
computed in numpy from those logits.
"""
import sys

import numpy as np
import pytest
import torch

from bonft.tasks import build_tokenizer
from bonft.verifiers import RewardModel, UnitTests, make_verifier
from bonft.verifiers.scoring import load_verifier


@pytest.fixture
def clean_path(monkeypatch):
    """load_verifier puts folders first on sys.path: restore it (and drop the modules the test imported) afterwards."""
    monkeypatch.setattr(sys, "path", list(sys.path))
    before = set(sys.modules)
    yield
    for name in set(sys.modules) - before:
        sys.modules.pop(name, None)


def test_module_function_resolves_from_the_working_directory(tmp_path, monkeypatch, clean_path):
    (tmp_path / "shelf_check_cwd.py").write_text("def score(prompts, responses):\n    return [float(len(r)) for r in responses]\n")
    monkeypatch.chdir(tmp_path)
    sys.path[:] = [p for p in sys.path if p not in ("", str(tmp_path))]  # as under the installed `bonft` command
    fn = load_verifier("shelf_check_cwd:score")
    assert fn(["p", "q"], ["ab", "abcd"]) == [2.0, 4.0]


def test_file_function_imports_its_siblings(tmp_path, clean_path):
    pkg = tmp_path / "checks"
    pkg.mkdir()
    (pkg / "shelf_rules_sib.py").write_text("LIMIT = 3\n")
    (pkg / "grade.py").write_text("from shelf_rules_sib import LIMIT\n"
                                  "def score(prompts, responses):\n    return [float(len(r) <= LIMIT) for r in responses]\n")
    fn = load_verifier(f"{pkg / 'grade.py'}:score")
    assert fn(["p", "p"], ["abc", "abcd"]) == [1.0, 0.0]
    assert sys.path[0] == str(pkg)


def test_load_errors_are_one_line_naming_the_cause(tmp_path, clean_path):
    (tmp_path / "broken.py").write_text("import shelf_helpers_absent\n")
    with pytest.raises(ValueError) as e:
        load_verifier(f"{tmp_path / 'broken.py'}:score")
    assert "\n" not in str(e.value)
    assert "importing the file" in str(e.value) and "ModuleNotFoundError: No module named 'shelf_helpers_absent'" in str(e.value)
    (tmp_path / "typo.py").write_text("def score(:\n")
    with pytest.raises(ValueError, match=r"importing the file .*typo.py.* raised SyntaxError"):
        load_verifier(f"{tmp_path / 'typo.py'}:score")
    with pytest.raises(ValueError, match=r"spec names the module 'surely_absent_xyz', which cannot be imported .*working directory"):
        load_verifier("surely_absent_xyz:f")


def save_reward_model(path, num_labels=1, head=True):
    from transformers import GPT2Config, GPT2ForSequenceClassification, GPT2LMHeadModel

    tok = build_tokenizer()
    cfg = GPT2Config(vocab_size=len(tok), n_positions=64, n_embd=32, n_layer=1, n_head=2, num_labels=num_labels,
                     pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    torch.manual_seed(0)
    model = (GPT2ForSequenceClassification if head else GPT2LMHeadModel)(cfg)
    model.save_pretrained(str(path))
    tok.save_pretrained(str(path))
    return model.eval(), tok


PROMPTS = ["jars on shelf 3? ", "jars on shelf 1? ", "add 4 and 5: "]
RESPONSES = ["9", "twelve jars", "4"]


def direct_logits(model, tok, text):
    ids = torch.tensor([tok(text)["input_ids"]])
    with torch.no_grad():
        return model(input_ids=ids).logits[0].double().numpy()


def test_reward_model_scores_match_the_model_on_each_text_alone(tmp_path):
    model, tok = save_reward_model(tmp_path / "rm")
    want = np.array([direct_logits(model, tok, p + r)[0] for p, r in zip(PROMPTS, RESPONSES)])
    for batch_size in (1, 2, 3):  # right padding must not move a score
        v = RewardModel(tmp_path / "rm", batch_size=batch_size)(PROMPTS, RESPONSES)
        np.testing.assert_allclose(v.scores, want, rtol=0, atol=1e-5)
        assert v.rewards is None
    cut = float(np.median(want))
    v = RewardModel(tmp_path / "rm", threshold=cut)(PROMPTS, RESPONSES)
    assert v.rewards.tolist() == [float(s >= cut) for s in want] and v.rewards.sum() == 2.0


def test_reward_model_two_labels_is_the_probability_of_the_label(tmp_path):
    model, tok = save_reward_model(tmp_path / "rm2", num_labels=2)
    logits = np.array([direct_logits(model, tok, p + r) for p, r in zip(PROMPTS, RESPONSES)])
    probs = np.exp(logits) / np.exp(logits).sum(1, keepdims=True)  # numpy softmax
    np.testing.assert_allclose(RewardModel(tmp_path / "rm2", batch_size=2)(PROMPTS, RESPONSES).scores, probs[:, 1], atol=1e-6)
    np.testing.assert_allclose(RewardModel(tmp_path / "rm2", label=0)(PROMPTS, RESPONSES).scores, probs[:, 0], atol=1e-6)
    with pytest.raises(ValueError, match=r"label must be <= 1, got label=2"):
        RewardModel(tmp_path / "rm2", label=2)


def test_reward_model_without_a_classification_head_is_refused(tmp_path):
    save_reward_model(tmp_path / "lm", head=False)
    with pytest.raises(ValueError, match=r"must hold a sequence-classification model .* architectures \['GPT2LMHeadModel'\]"):
        RewardModel(tmp_path / "lm")
    (tmp_path / "empty").mkdir()
    with pytest.raises(ValueError, match=r"must hold a sequence-classification model .* no config.json"):
        RewardModel(tmp_path / "empty")
    with pytest.raises(ValueError, match=r"no such directory"):
        RewardModel(tmp_path / "absent")


def test_verifiers_by_name(tmp_path, clean_path):
    save_reward_model(tmp_path / "rm")
    rm = make_verifier("reward_model", {"path": str(tmp_path / "rm"), "threshold": 0.0}, device="cpu")
    assert isinstance(rm, RewardModel) and rm.threshold == 0.0 and rm.device.type == "cpu"
    ut = make_verifier("unit_tests", {"field": "checks", "wall_time": 2.0})
    assert isinstance(ut, UnitTests) and ut.fields == {"checks": ut.fields["checks"]}
    with pytest.raises(TypeError, match=r"verifier_params of 'reward_model' must be among \['path', 'threshold', 'batch_size', "
                                        r"'device', 'label', 'max_length'\], got \['path', 'treshold'\]"):
        make_verifier("reward_model", {"path": str(tmp_path / "rm"), "treshold": 0.0})
    with pytest.raises(ValueError, match=r"eval_verifier = 'reward_model' needs eval_verifier_params.path"):
        make_verifier("reward_model", {}, key="eval_verifier")
    with pytest.raises(ValueError, match=r"verifier_params cannot take effect with verifier = 'bonft.verifiers:ExactMatch'"):
        make_verifier("bonft.verifiers:ExactMatch", {"x": 1})
    with pytest.raises(ValueError, match=r"verifier must be one of \('unit_tests', 'reward_model'\) or 'module:function', got 'rm'"):
        make_verifier("rm")
    with pytest.raises(ValueError, match=r"wall_time"):
        make_verifier("unit_tests", {"wall_time": -1.0})


def save_qwen_reward_model(path, *, config_pad_id, tokenizer_pad=True):
    """A tiny Qwen2 two-class reward model beside a character-level tokenizer with no BOS token ("<pad>" = 0,
    "</s>" = 1); the model's config names ``config_pad_id`` as its pad id."""
    from tokenizers import Tokenizer, models, pre_tokenizers
    from transformers import PreTrainedTokenizerFast, Qwen2Config, Qwen2ForSequenceClassification

    words = ["<pad>", "</s>", "<unk>"] + list("abcdefghijklmnopqrstuvwxyz0123456789+-=?:. ")
    core = Tokenizer(models.WordLevel(vocab={w: i for i, w in enumerate(words)}, unk_token="<unk>"))
    core.pre_tokenizer = pre_tokenizers.Split(pattern="", behavior="isolated")
    tok = PreTrainedTokenizerFast(tokenizer_object=core, eos_token="</s>", unk_token="<unk>",
                                  **({"pad_token": "<pad>"} if tokenizer_pad else {}))
    cfg = Qwen2Config(vocab_size=len(words), hidden_size=32, intermediate_size=64, num_hidden_layers=2,
                      num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=128, num_labels=2,
                      pad_token_id=config_pad_id, eos_token_id=1)
    torch.manual_seed(1)
    model = Qwen2ForSequenceClassification(cfg)
    model.save_pretrained(str(path))
    tok.save_pretrained(str(path))
    return model.eval(), tok


def test_reward_model_scores_do_not_depend_on_the_batch_when_the_config_names_another_pad_id(tmp_path):
    # The model's config says pad = 1 ("</s>"), the tokenizer pads with 0 ("<pad>"): a shorter text of a batch
    # must still be scored at its own last token, as alone (reference: the model's forward pass on each text
    # alone, no padding, softmax in numpy).
    model, _ = save_qwen_reward_model(tmp_path / "rm", config_pad_id=1)
    tok = __import__("transformers").AutoTokenizer.from_pretrained(str(tmp_path / "rm"))  # as saved and read back
    texts = ["2+2? answer: 4", "2+2? answer: 5", "2+2? answer: 4 " + "very " * 20, "2+2? 4"]
    logits = np.array([direct_logits(model, tok, t) for t in texts])
    want = np.exp(logits[:, 1]) / np.exp(logits).sum(1)
    rm = RewardModel(tmp_path / "rm", batch_size=8)
    batched = rm.score(texts)
    alone = np.array([rm.score([t])[0] for t in texts])
    np.testing.assert_allclose(batched, alone, rtol=0, atol=1e-6)
    np.testing.assert_allclose(batched, want, rtol=0, atol=1e-6)
    assert np.ptp(batched) > 1e-3  # the texts get different scores: the comparison can tell them apart


def test_reward_model_input_errors_name_the_cause(tmp_path):
    save_qwen_reward_model(tmp_path / "rm", config_pad_id=0)
    rm = RewardModel(tmp_path / "rm")
    with pytest.raises(ValueError, match=r"texts\[1\] = '' gives no tokens .*nothing to score"):
        rm.score(["2+2", ""])
    if not torch.cuda.is_available():
        with pytest.raises(ValueError, match=r"device='cuda', but torch sees no CUDA device on this machine; use device='cpu'"):
            RewardModel(tmp_path / "rm", device="cuda")
    with pytest.raises(ValueError, match=r"device must be a torch device string like 'cpu'.*got 'gpu0'"):
        RewardModel(tmp_path / "rm", device="gpu0")
    # a max_length past the model's positions was accepted, and every longer text then failed in the forward
    # pass, scored as a failure (a stand-in that a policy could aim at)
    save_reward_model(tmp_path / "gpt2rm")  # n_positions=64
    with pytest.raises(ValueError, match=r"max_length must be <= the model's 64 positions \(max_position_embeddings "
                                         r"of '.*gpt2rm'\), got max_length=512"):
        RewardModel(tmp_path / "gpt2rm", max_length=512)
    assert RewardModel(tmp_path / "gpt2rm", max_length=64).max_length == 64
    # a tokenizer saved without a pad token gets one added past the model's vocabulary (id 46 of 46 tokens)
    save_qwen_reward_model(tmp_path / "nopad", config_pad_id=None, tokenizer_pad=False)
    tok = __import__("transformers").AutoTokenizer.from_pretrained(str(tmp_path / "nopad"))
    if tok.pad_token_id == 46:
        with pytest.raises(ValueError, match=r"the tokenizer's pad token .* has id 46, but the model's "
                                             r"vocabulary has 46 tokens \(ids 0..45\); save the tokenizer with a pad token"):
            RewardModel(tmp_path / "nopad")
    else:  # a transformers that adds no pad token: batches are padded with the eos token, inside the vocabulary
        assert RewardModel(tmp_path / "nopad").score(["2+2", "2+2? 4"]).shape == (2,)


def test_code_runner_names_another_interpreter_when_it_picks_one(monkeypatch):
    # As root, a virtual environment the sandbox user cannot run made CodeRunner pick the system's Python without a
    # word: a correct "import numpy" solution came back crashed (ModuleNotFoundError).
    from bonft.verifiers import CodeRunner

    runner = CodeRunner({"p": "assert f() == 1"}, wall_time=2.0)
    monkeypatch.setattr(runner, "_root", True)
    monkeypatch.setattr(runner, "run_probe", lambda py: "crashed (Permission denied)" if py == sys.executable else None)
    with pytest.warns(UserWarning, match=r"CodeRunner runs candidates with \S+, not this process's .*\(the sandbox user "
                                         r"could not run .*\): modules installed only for this one .* pass python= to choose"):
        chosen = runner._interpreter()
    assert chosen != sys.executable
    import warnings

    chosen_runner = CodeRunner({"p": "assert f() == 1"}, wall_time=2.0, python=chosen)  # chosen by hand: no warning
    monkeypatch.setattr(chosen_runner, "run_probe", lambda py: None)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert chosen_runner._interpreter() == chosen
