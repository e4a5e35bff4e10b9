"""The run directory: one run at a time (an OS lock), and a failed write told in one line.

Common practice, no published source: an advisory ``flock`` on a file in the directory (Linux
flock(2): the kernel releases it when the holder's last descriptor closes, so also when the
process dies); a failed write reported with the path, the space and how to continue.
"""
import errno
import gc
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import textwrap
import time
import types
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file

import bonft.trainer.checkpoint as CK
import bonft.trainer.loop as T
import bonft.trainer.steps as S
from bonft.trainer.checkpoint import latest_checkpoint
from bonft.trainer.config import from_dict
from bonft.trainer.distributed import DistContext
from bonft.trainer.rundir import LOCK_NAME, RunDirBusy, StaleLockWarning, WriteFailed, run_lock

TINY = dict(layers=1, width=32, heads=2, max_positions=48, train_prompts=32, heldout_prompts=4, warm_start_steps=2,
            warm_start_batch_size=4, warm_start_lr=1e-2, rl_steps=4, prompts_per_step=4, n=4, k=2, lr=1e-2,
            eval_samples=4, eval_ks=[1, 4], n_boot=20, log_every=1, save_every=2, max_new_tokens=4, plots=False,
            eval_at_start=False, threads=1)


def tiny(root, name="run", **kw):
    return from_dict({**TINY, "run_dir": str(Path(root) / name), "name": name, **kw})


def record(run_dir) -> dict:
    text = (Path(run_dir) / LOCK_NAME).read_text()
    return json.loads(text) if text.strip() else {}


def weights(run_dir) -> dict:
    return load_file(str(latest_checkpoint(run_dir) / "model" / "model.safetensors"))


# ----------------------------------------------------------------------------- the lock
HOLDER = textwrap.dedent("""
    import sys, time
    from bonft.trainer.rundir import run_lock
    with run_lock(sys.argv[1]):
        print("held", flush=True)
        time.sleep(600)
""")


def test_a_second_process_is_refused_at_once_naming_the_holder(tmp_path):
    run_dir = tmp_path / "run"
    child = subprocess.Popen([sys.executable, "-c", HOLDER, str(run_dir)], stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "held"
        rec = record(run_dir)
        assert rec["pid"] == child.pid and rec["started"][:4].isdigit()
        with pytest.raises(RunDirBusy) as err:
            with run_lock(run_dir):
                pass
        msg = str(err.value)
        assert "\n" not in msg and f"pid {child.pid}" in msg and f"started {rec['started']}" in msg
        assert "in use by another training run" in msg
        # the trainer refuses the same way before it reads or writes anything
        with pytest.raises(RunDirBusy, match=rf"in use by another training run \(pid {child.pid} on host "):
            T.train(tiny(tmp_path, "run"), resume=True, progress=False)
        assert sorted(p.name for p in run_dir.iterdir()) == [LOCK_NAME]
    finally:
        child.kill()
        child.wait()
    # kill -9: the kernel dropped the lock; the record names a dead process and is taken over with a warning
    assert record(run_dir)["pid"] == child.pid
    with pytest.warns(StaleLockWarning, match=rf"taking over the lock of pid {child.pid} .* which is no longer running"):
        with run_lock(run_dir):
            assert record(run_dir)["pid"] == os.getpid()
    assert record(run_dir) == {}  # released cleanly: an empty record


def test_a_training_run_holds_the_lock_and_releases_it_on_ctrl_c_and_on_a_crash(tmp_path, monkeypatch):
    cfg = tiny(tmp_path)
    real = S.rl_step
    seen = []

    def interrupt(run, step, clock):
        seen.append(record(cfg.run_dir)["pid"])  # held while the step runs
        if step == 3:
            raise KeyboardInterrupt
        return real(run, step, clock)

    monkeypatch.setattr(S, "rl_step", interrupt)
    with pytest.raises(KeyboardInterrupt):
        T.train(cfg, progress=False)
    assert seen == [os.getpid()] * 2 and record(cfg.run_dir) == {}

    def crash(run, step, clock):
        raise RuntimeError("a bug in a step")

    monkeypatch.setattr(S, "rl_step", crash)
    with pytest.raises(RuntimeError, match="a bug in a step"):
        T.train(cfg, resume=True, progress=False)
    assert record(cfg.run_dir) == {}
    monkeypatch.setattr(S, "rl_step", real)
    summary = T.train(cfg, resume=True, progress=False)  # the same process takes it again: nothing was left held
    assert summary["steps"] == 6 and record(cfg.run_dir) == {}


def test_a_run_that_fails_before_writing_anything_leaves_no_directory(tmp_path, monkeypatch):
    # "nothing written" for a set-up error: the directory the lock created goes again (common practice)
    def broken(cfg, **kw):
        raise ValueError("a set-up error")

    monkeypatch.setattr(T, "build_run", broken)
    with pytest.raises(ValueError, match="a set-up error"):
        T.train(tiny(tmp_path, "new/run"), progress=False)
    assert list(tmp_path.iterdir()) == [tmp_path / "new"] and list((tmp_path / "new").iterdir()) == []
    (tmp_path / "kept").mkdir()  # a directory the user made stays, its lock file too (empty: released)
    with pytest.raises(ValueError, match="a set-up error"):
        T.train(tiny(tmp_path, "kept"), progress=False)
    assert [p.name for p in (tmp_path / "kept").iterdir()] == [LOCK_NAME] and record(tmp_path / "kept") == {}


def test_a_record_from_another_machine_is_refused_and_ranks_above_0_take_no_lock(tmp_path):
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    (run_dir / LOCK_NAME).write_text(json.dumps({"pid": 1, "host": "elsewhere", "started": "2026-01-01T00:00:00+00:00"}))
    with pytest.raises(RunDirBusy, match=r"locked by a run on another machine \(pid 1 on host elsewhere, started "
                                         r"2026-01-01T00:00:00\+00:00\); if that run is gone, delete .*run.lock"):
        with run_lock(run_dir):
            pass
    (run_dir / LOCK_NAME).write_text("")
    with run_lock(run_dir):  # rank 0 holds it ...
        with T._locked(run_dir, DistContext(rank=1, world_size=2)):  # ... and rank 1 of the same run takes nothing
            assert record(run_dir)["pid"] == os.getpid()


def test_two_trainer_processes_on_one_directory(tmp_path):
    """The case as a user meets it: a second `train --resume` while the first still runs fails at once."""
    cfg = tiny(tmp_path, rl_steps=40, save_every=0)
    (tmp_path / "cfg.json").write_text(json.dumps({**TINY, "rl_steps": 40, "save_every": 0, "run_dir": cfg.run_dir}))
    script = ("import json, sys\nfrom bonft.trainer.config import from_dict\nfrom bonft.trainer.loop import train\n"
              "train(from_dict(json.loads(open(sys.argv[1]).read())), progress=False)\n")
    first = subprocess.Popen([sys.executable, "-c", script, str(tmp_path / "cfg.json")], stderr=subprocess.PIPE, text=True,
                             env={**os.environ, "OMP_NUM_THREADS": "1"})
    try:
        while not (Path(cfg.run_dir) / "metrics.jsonl").is_file():  # the first run is past its set-up
            assert first.poll() is None, first.stderr.read()
            time.sleep(0.05)
        with pytest.raises(RunDirBusy, match=rf"pid {first.pid} on host .*, started 20"):
            T.train(cfg, resume=True, progress=False)
    finally:
        first.send_signal(signal.SIGINT)
        first.wait(timeout=300)
    assert record(cfg.run_dir) == {}  # Ctrl-C: released


# ----------------------------------------------------------------------------- failed writes
def test_a_checkpoint_that_cannot_be_written_is_one_line_and_resume_continues(tmp_path, monkeypatch):
    ref = tiny(tmp_path, "ref")
    T.train(ref, progress=False)
    cfg = tiny(tmp_path, "full")
    real, calls = torch.save, []

    def full_disk(obj, path, *a, **kw):  # what torch's serializer raises on a full disk
        calls.append(path)
        if len(calls) == 2:
            raise RuntimeError("[enforce fail at inline_container.cc:672] . unexpected pos 576 vs 534")
        return real(obj, path, *a, **kw)

    monkeypatch.setattr(CK.torch, "save", full_disk)
    with pytest.raises(WriteFailed) as err:
        T.train(cfg, progress=False)
    msg = str(err.value)
    ckpts = Path(cfg.run_dir) / "checkpoints"
    assert "\n" not in msg
    assert msg.startswith(f"could not write the checkpoint {ckpts / 'step-00000004'} (the file stream failed part-way)")
    assert " needed, " in msg and " free on /" in msg
    assert f"the unfinished {ckpts / f'step-00000004.tmp-{os.getpid()}'} was removed" in msg
    assert msg.endswith(f"the last verified checkpoint is {ckpts / 'step-00000002'}; free space and rerun with --resume")
    assert sorted(p.name for p in ckpts.iterdir()) == ["step-00000002"]  # no temporary folder left
    monkeypatch.setattr(CK.torch, "save", real)
    T.train(cfg, resume=True, progress=False)
    w, r = weights(cfg.run_dir), weights(ref.run_dir)
    assert all(torch.equal(w[k], r[k]) for k in r)  # nothing was lost: the resumed run ends where the whole one does


def test_a_metrics_line_cut_short_is_taken_back(tmp_path, monkeypatch):
    cfg = tiny(tmp_path)
    real_write, state = os.write, {"lines": 0}

    class HalfFullDisk(types.SimpleNamespace):
        def __getattr__(self, name):
            return getattr(os, name)

        @staticmethod
        def write(fd, data):
            state["lines"] += 1
            if state["lines"] == 3:  # the third line: half of it fits, then the disk is full
                real_write(fd, bytes(data[: len(data) // 2]))
                raise OSError(errno.ENOSPC, "No space left on device")
            return real_write(fd, data)

    monkeypatch.setattr(T, "os", HalfFullDisk())
    with pytest.raises(WriteFailed, match=r"^could not write a metrics line to .*metrics.jsonl \(No space left on device\); "
                                          r"about \d+ bytes needed, .* free on /.*; the last verified checkpoint is "
                                          r".*step-00000002; free space and rerun with --resume$"):
        T.train(cfg, progress=False)
    lines = (Path(cfg.run_dir) / "metrics.jsonl").read_text().splitlines()
    assert [json.loads(ln)["step"] for ln in lines] == [1, 2]  # whole lines only: resume can read them
    monkeypatch.setattr(T, "os", os)
    T.train(cfg, resume=True, progress=False)
    steps = [json.loads(ln)["step"] for ln in (Path(cfg.run_dir) / "metrics.jsonl").read_text().splitlines() if '"train"' in ln]
    assert steps == [1, 2, 3, 4, 5, 6]


def test_a_plot_that_cannot_be_written_names_it(tmp_path, monkeypatch):
    import bonft.viz

    def no_space(*a, **kw):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(bonft.viz, "plot_evaluations", no_space)
    cfg = tiny(tmp_path, plots=True, rl_steps=2)
    with pytest.raises(WriteFailed, match=r"^could not write the plot .*curves.png \(No space left on device\);.*"
                                          r"the last verified checkpoint is .*step-00000004; free space and rerun with --resume$"):
        T.train(cfg, progress=False)


def test_the_final_samples_file_that_cannot_be_written_warns_and_the_final_checkpoint_is_written(tmp_path, monkeypatch):
    import bonft.trainer.evaluation as E

    def no_space(path, rows):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(E, "write_samples", no_space)
    cfg = tiny(tmp_path, rl_steps=2)
    with pytest.warns(RuntimeWarning, match=r"^the final evaluation's samples were not written to .*heldout_samples.jsonl "
                                            r"\(OSError: \[Errno 28\] No space left on device\); the evaluation and the "
                                            r"checkpoints are not affected$"):
        T.train(cfg, progress=False)
    assert latest_checkpoint(cfg.run_dir).name == "step-00000004" and (Path(cfg.run_dir) / "summary.json").is_file()
    assert not (Path(cfg.run_dir) / "heldout_samples.jsonl").exists()
    monkeypatch.undo()
    off = tiny(tmp_path, "off", rl_steps=1, heldout_samples=False)  # the key switches the file off
    T.train(off, progress=False)
    assert not (Path(off.run_dir) / "heldout_samples.jsonl").exists() and (Path(off.run_dir) / "summary.json").is_file()


@pytest.fixture
def small_disk(tmp_path):
    """A tmpfs mounted for the test (needs root; skipped where mounting is not allowed)."""
    where = tmp_path / "disk"
    where.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    ok = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(where)], capture_output=True)
    if ok.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {ok.stderr.decode().strip()}")

    def resize(nbytes: int) -> None:
        subprocess.run(["mount", "-o", f"remount,size={nbytes}", str(where)], check=True)

    try:
        yield where, resize
    finally:
        subprocess.run(["umount", "-l", str(where)], check=False)


def test_a_full_filesystem_stops_the_run_with_one_line_and_rerun_with_resume_finishes(tmp_path, small_disk):
    where, resize = small_disk
    ref = tiny(tmp_path, "ref")
    T.train(ref, progress=False)
    one = sum(f.stat().st_size for f in (latest_checkpoint(ref.run_dir)).rglob("*") if f.is_file())
    resize(int(one * 1.5) // 4096 * 4096 + 16 * 4096)  # room for the first checkpoint, not for the second
    cfg = tiny(where, "run")
    with pytest.raises(WriteFailed) as err:
        T.train(cfg, progress=False)
    msg = str(err.value)
    ckpts = Path(cfg.run_dir) / "checkpoints"
    assert "\n" not in msg and msg.startswith(f"could not write the checkpoint {ckpts / 'step-00000004'} (")
    assert f" free on {where}" in msg and "the unfinished" in msg
    # the free space is the disk's once the unfinished folder is gone (torch's writer, left open by the failed
    # frames, used to keep the deleted state.pt's blocks in use until the error was dropped)
    said = re.search(r"[;,] ([\d.]+) (bytes|kB|MB) free on ", msg)
    assert said, msg
    del err
    gc.collect()  # nothing of the failed save is held any more
    unit = {"bytes": 1, "kB": 1 << 10, "MB": 1 << 20}[said.group(2)]
    assert float(said.group(1)) * unit == pytest.approx(shutil.disk_usage(where).free, rel=0.05, abs=unit * 0.1)
    assert msg.endswith(f"the last verified checkpoint is {ckpts / 'step-00000002'}; free space and rerun with --resume")
    assert sorted(p.name for p in ckpts.iterdir()) == ["step-00000002"]
    resize(8 * one + 64 * 4096)  # space freed
    T.train(cfg, resume=True, progress=False)
    w, r = weights(cfg.run_dir), weights(ref.run_dir)
    assert all(torch.equal(w[k], r[k]) for k in r)


def test_the_command_line_shows_one_error_line(tmp_path, monkeypatch, capsys):
    from bonft.cli.main import main
    from bonft.trainer.config import to_toml

    cfg = tiny(tmp_path)
    (tmp_path / "recipe.toml").write_text(to_toml(cfg))

    def full_disk(*a, **kw):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(CK.torch, "save", full_disk)
    assert main(["train", str(tmp_path / "recipe.toml"), "--quiet"]) != 0
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert len(err) == 1 and err[0].startswith(f"bonft train: error: could not write the checkpoint {cfg.run_dir}/checkpoints/"
                                               f"step-00000002 (No space left on device); about ")
    assert err[0].endswith("no checkpoint was written yet; free space and rerun with --resume")
    # a second run while none holds the directory starts; one while the first holds it is refused in one line
    monkeypatch.undo()
    with run_lock(cfg.run_dir):
        assert main(["train", str(tmp_path / "recipe.toml"), "--quiet", "--resume"]) != 0
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert len(err) == 1
    assert re.fullmatch(rf"bonft train: error: run_dir '{re.escape(cfg.run_dir)}' is in use by another training run "
                        rf"\(pid {os.getpid()} on host {re.escape(socket.gethostname())}, started "
                        r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\+00:00\); wait for it to finish, stop it, or choose another "
                        r"run directory", err[0]), err[0]


def test_a_write_that_fails_for_another_reason_than_space_does_not_blame_the_disk():
    # EEXIST (a file where the run directory goes) and EISDIR (a directory where a file goes) have nothing to do
    # with free space: the message names the cause and leaves the free space out; ENOSPC keeps it
    from bonft.trainer.rundir import write_failed

    msg = str(write_failed(OSError(errno.EEXIST, "File exists"), path="/x/afile", run_dir=None, what="the run directory"))
    assert msg == "could not write the run directory /x/afile (File exists); fix what blocks /x/afile (File exists) and rerun with --resume"
    full = str(write_failed(OSError(errno.ENOSPC, "No space left on device"), path="/tmp/x", run_dir=None,
                            what="the summary", need_bytes=2048))
    assert "about 2.0 kB needed" in full and " free on " in full and full.endswith("; free space and rerun with --resume")


# ----------------------------------------------------------------------------- kills and interrupts at every moment
def metric_rows(run_dir) -> list[tuple[str, int]]:
    return [(r["kind"], r["step"]) for r in map(json.loads, (Path(run_dir) / "metrics.jsonl").read_text().splitlines())]


WHOLE = [("train", 1), ("train", 2), ("train", 3), ("train", 4), ("eval", 4), ("train", 5), ("train", 6), ("eval", 6)]


@pytest.mark.parametrize("limit", ["config", "metrics"])
def test_a_resume_cut_short_while_it_rewrites_config_and_metrics_leaves_both_whole(tmp_path, limit):
    # a file-size limit (ulimit -f) stops the write of the configuration, or of the trimmed metrics, part-way:
    # the files are replaced only once written whole, so both keep their bytes and the next resume finishes
    cfg = tiny(tmp_path, eval_every=2)
    T.train(cfg, progress=False)
    run = Path(cfg.run_dir)
    shutil.rmtree(run / "checkpoints" / "step-00000006")  # resuming from step 4 trims the metrics
    (run / "summary.json").unlink()
    before = {name: (run / name).read_bytes() for name in ("config.toml", "metrics.jsonl")}
    cap = len(before["config.toml"]) // 2 if limit == "config" else len(before["config.toml"]) + 200
    assert cap < len(before["metrics.jsonl"]) // 2
    script = textwrap.dedent(f"""
        import resource
        from bonft.trainer.config import load_config
        from bonft.trainer.loop import train
        from bonft.trainer.rundir import WriteFailed
        cfg = load_config({str(run / "config.toml")!r})
        resource.setrlimit(resource.RLIMIT_FSIZE, ({cap}, {cap}))
        try:
            train(cfg, resume=True, progress=False)
        except WriteFailed as e:
            print("WRITEFAILED", e)
    """)
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert "WRITEFAILED could not write" in out.stdout, out.stdout + out.stderr
    assert {name: (run / name).read_bytes() for name in before} == before
    assert not [p.name for p in run.iterdir() if p.name.endswith(".tmp")]  # no temporary file left
    T.train(cfg, resume=True, progress=False)
    assert metric_rows(run) == WHOLE


def test_a_cut_off_last_metrics_line_is_dropped_with_a_warning_and_a_bad_line_inside_is_named(tmp_path):
    cfg = tiny(tmp_path, eval_every=2)
    T.train(cfg, progress=False)
    run = Path(cfg.run_dir)
    path = run / "metrics.jsonl"
    good = path.read_text()
    lines = good.splitlines()
    with open(path, "a") as fh:  # a kill (or power loss) in the middle of the next line
        fh.write('{"kind": "train", "step": 7, "lo')
    with pytest.warns(UserWarning, match=rf"^{re.escape(str(path))} line {len(lines) + 1}: dropped a cut-off last line "
                                         r"\(no newline at its end, not valid JSON \(Unterminated string"):
        T.train(cfg, resume=True, progress=False)
    assert path.read_text() == good and metric_rows(run) == WHOLE
    path.write_text("\n".join([lines[0], '{"kind": "train", "st', *lines[1:]]) + "\n")  # a damaged line inside
    with pytest.raises(ValueError, match=rf"^{re.escape(str(path))} line 2: not valid JSON \(Unterminated string "
                                         r"starting at column \d+\); repair or delete that line"):
        T.train(cfg, resume=True, progress=False)


@pytest.mark.parametrize("cut", ["after", "inside"])
def test_ctrl_c_while_a_metrics_line_is_written_keeps_the_line_of_the_step_it_checkpoints(tmp_path, monkeypatch, cut):
    # Ctrl-C right after the line of step 3 is on disk ("after"), or half-way through it ("inside"): the line is
    # kept whole, step 3 is checkpointed, and the resumed run neither loses nor repeats a line
    cfg = tiny(tmp_path, eval_every=2)
    real_write, pressed = os.write, []

    class CtrlC(types.SimpleNamespace):
        def __getattr__(self, name):
            return getattr(os, name)

        @staticmethod
        def write(fd, data):
            if b'"step": 3,' in bytes(data) and b'"kind": "train"' in bytes(data) and not pressed:
                pressed.append(1)
                if cut == "inside":
                    real_write(fd, bytes(data[:10]))
                    raise KeyboardInterrupt
                real_write(fd, data)
                raise KeyboardInterrupt
            return real_write(fd, data)

    monkeypatch.setattr(T, "os", CtrlC())
    with pytest.raises(KeyboardInterrupt):
        T.train(cfg, progress=False)
    monkeypatch.setattr(T, "os", os)
    assert metric_rows(cfg.run_dir) == WHOLE[:3]
    assert [p.name for p in (Path(cfg.run_dir) / "checkpoints").iterdir() if p.name == "step-00000003"]
    T.train(cfg, resume=True, progress=False)
    assert metric_rows(cfg.run_dir) == WHOLE


def test_ctrl_c_between_a_step_and_its_metrics_line_writes_the_line_with_the_checkpoint(tmp_path, monkeypatch):
    from bonft.trainer.zero_credit import ZeroCreditWatch

    cfg = tiny(tmp_path, eval_every=2)

    def ctrl_c(self, rl_step, rec):  # runs after step 3 is applied, before its line is written
        raise KeyboardInterrupt

    monkeypatch.setattr(ZeroCreditWatch, "update", ctrl_c)
    with pytest.raises(KeyboardInterrupt):
        T.train(cfg, progress=False)
    assert metric_rows(cfg.run_dir) == WHOLE[:3]
    assert latest_checkpoint(cfg.run_dir).name == "step-00000003"


@pytest.mark.parametrize("at", [4, 6])
def test_an_evaluation_cut_short_by_ctrl_c_is_redone_on_resume(tmp_path, monkeypatch, at):
    # the interrupt checkpoints step `at` before its evaluation finished: the resumed run evaluates that step
    # first (the final one with its samples file), so no evaluation is lost and summary.json lists every one
    import bonft.trainer.evaluation as E

    ref = tiny(tmp_path, "ref", eval_every=2)
    T.train(ref, progress=False)
    cfg = tiny(tmp_path, "cut", eval_every=2)
    real = E.evaluate_run

    def ctrl_c(run, step, **kw):
        if step == at:
            raise KeyboardInterrupt
        return real(run, step, **kw)

    monkeypatch.setattr(T, "evaluate_run", ctrl_c)
    with pytest.raises(KeyboardInterrupt):
        T.train(cfg, progress=False)
    monkeypatch.undo()
    assert latest_checkpoint(cfg.run_dir).name == f"step-{at:08d}"
    assert ("eval", at) not in metric_rows(cfg.run_dir)
    T.train(cfg, resume=True, progress=False)
    assert metric_rows(cfg.run_dir) == WHOLE
    summary = json.loads((Path(cfg.run_dir) / "summary.json").read_text())
    assert [e["step"] for e in summary["evaluations"]] == [4, 6]
    same = json.loads((Path(ref.run_dir) / "summary.json").read_text())
    assert [e["pass_at_k"] for e in summary["evaluations"]] == [e["pass_at_k"] for e in same["evaluations"]]
    assert (Path(cfg.run_dir) / "heldout_samples.jsonl").read_text() == (Path(ref.run_dir) / "heldout_samples.jsonl").read_text()


def test_a_fresh_run_writes_its_own_anchor_over_one_left_in_the_directory(tmp_path):
    # an earlier run killed before its first checkpoint left rl_start/ (and a temporary folder): a fresh run in
    # the same directory starts RL from its own policy, so the anchor is that policy and the first KL is 0
    other = tiny(tmp_path, "other", anchor_weight=0.5, seed=7, rl_steps=1)
    T.train(other, progress=False)
    cfg = tiny(tmp_path, "run", anchor_weight=0.5, keep_checkpoints=5)
    run = Path(cfg.run_dir)
    run.mkdir()
    shutil.copytree(Path(other.run_dir) / "rl_start", run / "rl_start")
    (run / ".rl_start.tmp-abc123").mkdir()
    T.train(cfg, progress=False)
    anchor = load_file(str(run / "rl_start" / "model" / "model.safetensors"))
    start = load_file(str(run / "checkpoints" / "step-00000002" / "model" / "model.safetensors"))  # the end of the warm start
    assert anchor.keys() == start.keys() and all(torch.equal(anchor[k], start[k]) for k in start)
    first = [r for r in map(json.loads, (run / "metrics.jsonl").read_text().splitlines()) if r["step"] == 3][0]
    assert first["anchor/kl"] == pytest.approx(0.0, abs=1e-6)
    assert not list(run.glob(".rl_start.*"))
    # resumed inside RL, the run needs its anchor: a missing one is named, not rebuilt from a later policy
    shutil.rmtree(run / "checkpoints" / "step-00000006")
    shutil.rmtree(run / "rl_start")
    with pytest.raises(ValueError, match=r"^--resume: the run's KL anchor .*rl_start \(the policy at the start of RL"):
        T.train(cfg, resume=True, progress=False)


def test_resume_with_nothing_to_continue(tmp_path):
    # a typo is refused; a run stopped before its first checkpoint (a kill or a full disk while writing it: the
    # message says "rerun with --resume") starts again from step 0 with its lines kept aside, and ends as a fresh run
    cfg = tiny(tmp_path, "typo")
    with pytest.raises(ValueError, match=r"^--resume: run_dir '.*typo' does not exist; check --output"):
        T.train(cfg, resume=True, progress=False)
    assert not Path(cfg.run_dir).exists()
    out = Path(cfg.run_dir)
    (out / "checkpoints" / "step-00000002.tmp-999").mkdir(parents=True)  # killed while writing its first checkpoint
    (out / "metrics.jsonl").write_text('{"kind": "train", "step": 1}\n')
    (out / ".config.toml.k2x9.tmp").write_text("name = ")  # a kill during an atomic write left its temporary file
    (out / ".my-notes.tmp").write_text("mine")  # not the run's: stays
    with pytest.warns(UserWarning, match=r"has no checkpoint to continue from .* starts again from step 0; the 1 "
                                         r"metrics line\(s\) it had are kept in .*metrics.stopped.jsonl"):
        T.train(cfg, resume=True, progress=False)
    assert (out / "metrics.stopped.jsonl").read_text() == '{"kind": "train", "step": 1}\n'
    assert [f.name for f in out.glob(".*.tmp")] == [".my-notes.tmp"]
    fresh = tiny(tmp_path, "fresh")
    Path(fresh.run_dir).mkdir()  # an existing empty folder: --resume says it starts a new run
    with pytest.warns(UserWarning, match=r"^--resume: .*fresh holds no run to continue \(no checkpoint, no metrics "
                                         r"line\): it starts a new run from step 0"):
        T.train(fresh, resume=True, progress=False)
    strip = lambda p: [{k: v for k, v in json.loads(ln).items() if "time" not in k and "per_s" not in k}  # noqa: E731
                       for ln in p.read_text().splitlines()]  # every number but the timings
    assert strip(out / "metrics.jsonl") == strip(Path(fresh.run_dir) / "metrics.jsonl")
    afile = tmp_path / "afile"
    afile.write_text("x")
    with pytest.raises(ValueError, match=r"^run_dir '.*afile' is a file, not a directory"):
        T.train(tiny(tmp_path, "afile"), progress=False)


def test_a_summary_that_cannot_be_written_leaves_the_previous_one(tmp_path, monkeypatch):
    import bonft._core.jsonl as J

    cfg = tiny(tmp_path, rl_steps=2)
    T.train(cfg, progress=False)
    path = Path(cfg.run_dir) / "summary.json"
    before = path.read_bytes()

    real = os.fsync

    def no_space(fd):  # the new summary's bytes do not reach the disk (the other files' do)
        if os.path.basename(os.readlink(f"/proc/self/fd/{fd}")).startswith(".summary.json."):
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(fd)

    monkeypatch.setattr(J.os, "fsync", no_space)
    with pytest.raises(WriteFailed, match=r"^could not write the summary .*summary.json \(No space left on device\)"):
        T.train(cfg, resume=True, progress=False)
    monkeypatch.undo()
    assert path.read_bytes() == before and not list(Path(cfg.run_dir).glob(".*.tmp"))


def test_a_full_disk_while_the_weights_are_written_is_one_line_too(tmp_path, monkeypatch):
    # safetensors' writer reports a full disk as its own SafetensorError (a plain Exception), not an OSError: with
    # SGD (no optimizer state) the weights are a checkpoint's largest file, so this is the usual full-disk case
    from safetensors import SafetensorError

    import bonft.trainer.checkpoint as C

    real, calls = C.save_weights, []

    def full(model, directory):
        calls.append(directory)
        if len(calls) == 2:  # the second checkpoint
            raise SafetensorError("Error while serializing: I/O error: No space left on device (os error 28)")
        return real(model, directory)

    monkeypatch.setattr(C, "save_weights", full)
    cfg = tiny(tmp_path, "sgd")
    with pytest.raises(WriteFailed) as err:
        T.train(cfg, progress=False)
    ckpts = Path(cfg.run_dir) / "checkpoints"
    msg = str(err.value)
    assert msg.startswith(f"could not write the checkpoint {ckpts / 'step-00000004'} (Error while "
                          f"serializing: I/O error: No space left on device (os error 28))"), msg
    assert msg.endswith(f"the last verified checkpoint is {ckpts / 'step-00000002'}; free space and rerun with --resume")
