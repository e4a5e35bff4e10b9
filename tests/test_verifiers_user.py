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
