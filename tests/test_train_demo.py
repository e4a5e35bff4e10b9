"""The demo pipeline on a tiny scale: warm start once, two objectives from it, one comparison."""
import json

from bonft.trainer.demo import DemoConfig, run_demo, study_table


def test_tiny_demo_end_to_end(tmp_path, capsys):
    dc = DemoConfig(run_dir=str(tmp_path / "demo"), n_train=32, n_eval=4, sft_steps=3, sft_batch_size=8, rl_steps=2,
                    prompts_per_step=4, n=8, k=4, eval_n=8, eval_ks=[1, 8], layers=1, width=32, heads=2,
                    max_new_tokens=5, n_boot=50, threads=1)
    summary = run_demo(dc, progress=False)
    out = tmp_path / "demo"
    assert set(summary["results"]) == {"warm_start", "loo_reinforce", "pass_at_k"}
    assert (out / "comparison.png").stat().st_size > 0 and (out / "comparison.md").is_file()
    saved = json.loads((out / "summary.json").read_text())
    assert saved["table"].count("\n") == 4  # header, rule, three policies
    for ev in saved["results"].values():  # all evaluated on the same held-out prompts and budget
        assert ev["n_prompts"] == 4 and ev["n_samples"] == 8 and ev["ks"] == [1, 8]
    # the RL stages started from the warm start's checkpoint
    rl_cfg = (out / "pass_at_k" / "config.toml").read_text()
    assert "warm_start/checkpoints/step-00000003" in rl_cfg and 'objective = "pass_at_k"' in rl_cfg
    # a rerun reuses every finished stage: no stage's summary is rewritten
    stamps = {p: p.stat().st_mtime_ns for p in out.glob("*/summary.json")}
    again = run_demo(dc, progress=False)
    assert again["results"] == summary["results"] and len(stamps) == 3
    assert {p: p.stat().st_mtime_ns for p in out.glob("*/summary.json")} == stamps


def test_study_table_t_interval():
    ev = lambda m: {"ks": [1], "pass_at_k": {"mean": [m]}, "distinct_answers": 2.0}
    table = study_table({0: {"a": ev(0.2)}, 1: {"a": ev(0.4)}, 2: {"a": ev(0.3)}})
    # mean 0.3, sd 0.1, n 3: half-width t_{0.975,2} * 0.1 / sqrt(3) = 4.3027 * 0.05774 = 0.2484
    # (t quantile 4.303 from a Student-t table, e.g. NIST/SEMATECH e-Handbook, Table 1.4.2 of t critical values)
    assert "0.300 [0.052, 0.548]" in table
