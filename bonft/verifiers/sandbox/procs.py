"""/proc scans and process cleanup for the sandbox (Linux)."""
from __future__ import annotations

import os
import signal
import subprocess
import sys


def _statuses():
    """(pid, fields of /proc/PID/status) for every process still readable."""
    for pid in os.listdir("/proc"):
        if not pid.isdigit():
            continue
        try:
            with open(f"/proc/{pid}/status") as f:
                yield int(pid), dict(line.split(":", 1) for line in f if ":" in line)
        except OSError:
            continue


def _uid(fields) -> int:
    return int(fields.get("Uid", "-1").split()[0])


def user_tasks(uid: int) -> int:
    """Number of tasks (threads) owned by ``uid``, what RLIMIT_NPROC counts."""
    return sum(int(f.get("Threads", "1")) for _, f in _statuses() if _uid(f) == uid)


def pids_of(uid: int) -> list[int]:
    """Live (non-zombie) processes whose real uid is ``uid``."""
    return [pid for pid, f in _statuses() if _uid(f) == uid and not f.get("State", "").strip().startswith("Z")]


def kill_uid(uid: int) -> None:
    """As root: SIGKILL every process of ``uid`` (kill(-1) sent from a child running as ``uid``)."""
    def as_uid() -> None:
        os.setgid(uid)
        os.setuid(uid)
        try:
            os.kill(-1, signal.SIGKILL)
        except OSError:
            pass

    try:
        subprocess.run(["/bin/true"] if os.path.exists("/bin/true") else [sys.executable, "-c", "pass"],
                       preexec_fn=as_uid, env={}, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                       stderr=subprocess.DEVNULL, timeout=5)
    except (OSError, subprocess.SubprocessError):
        pass


def kill_by_cwd(workdir: str) -> None:
    """Not root: kill our processes still working in ``workdir`` (escaped the group)."""
    real = os.path.realpath(workdir)
    for pid in os.listdir("/proc"):
        if not pid.isdigit() or int(pid) == os.getpid():
            continue
        try:
            cwd = os.readlink(f"/proc/{pid}/cwd")
        except OSError:
            continue
        if cwd == real or cwd.startswith(real + os.sep):
            try:
                os.kill(int(pid), signal.SIGKILL)
            except OSError:
                pass
