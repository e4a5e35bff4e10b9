"""The run directory as one run's property: its lock, and what a failed write tells the user.

**The lock.** A training run holds an OS advisory lock (``fcntl.flock``) on ``RUN/run.lock``
from before it reads a checkpoint until it returns, so two runs never write the same
checkpoints and metrics. The kernel drops the lock when the process ends for any reason
(exit, crash, ``kill -9``, Ctrl-C), so a lock is never left held by a dead process. The file
records the holder (pid, host, start time): a second run on the same directory fails at once
naming them; a record left by a process that is gone (its lock went with it) is taken over
with a :class:`StaleLockWarning`. Under torchrun only rank 0 takes the lock (it is the rank
that writes). ``flock`` may not reach across machines on network filesystems; a record
written on another host is therefore refused rather than taken over.

**Failed writes.** A checkpoint, a metrics line, the summary or the plot that cannot be
written (a full disk, a quota, a read-only or vanished directory) stops the run with one
:class:`WriteFailed` line: the path, the bytes needed when known, the free space, the
unfinished temporary folder removed, the last verified checkpoint, and what to do.
"""
from __future__ import annotations

import contextlib
import datetime
import errno
import fcntl
import gc
import json
import os
import shutil
import socket
import traceback
import warnings
from pathlib import Path
from typing import Iterator

from bonft.trainer.checkpoint import CheckpointError, latest_checkpoint

LOCK_NAME = "run.lock"


class RunDirBusy(ValueError):
    """Another live process holds the run directory's lock."""


class StaleLockWarning(UserWarning):
    """The run directory's lock record names a process that is gone; the lock was taken over."""


class WriteFailed(OSError):
    """A file of the run could not be written; the message says what, where and what to do."""


# ----------------------------------------------------------------------------- the lock
def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by another user
        return True
    return True


def _read_record(fd: int) -> dict:
    os.lseek(fd, 0, os.SEEK_SET)
    raw = os.read(fd, 4096)
    try:
        rec = json.loads(raw.decode("utf-8")) if raw.strip() else {}
    except (UnicodeDecodeError, json.JSONDecodeError):
        return {"unreadable": True}
    return rec if isinstance(rec, dict) else {"unreadable": True}


def _holder(rec: dict) -> str:
    if not rec or rec.get("unreadable"):
        return "a process whose record cannot be read"
    return f"pid {rec.get('pid', '?')} on host {rec.get('host', '?')}, started {rec.get('started', '?')}"


@contextlib.contextmanager
def run_lock(run_dir: str | Path, *, hold: bool = True) -> Iterator[Path | None]:
    """Hold the lock of ``run_dir`` for the body; yields the lock file's path (None when ``hold`` is False).

    Raises :class:`RunDirBusy` at once when another live process holds it. ``hold=False``
    (ranks > 0 under torchrun) takes nothing.
    """
    if not hold:
        yield None
        return
    run_dir = Path(run_dir)
    created = not run_dir.exists()
    try:
        run_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise write_failed(e, path=run_dir, run_dir=None, what="the run directory") from None
    path = run_dir / LOCK_NAME
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    failed = False
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as e:
            if e.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise
            raise RunDirBusy(f"run_dir {str(run_dir)!r} is in use by another training run ({_holder(_read_record(fd))}); "
                             f"wait for it to finish, stop it, or choose another run directory") from None
        rec = _read_record(fd)
        host = socket.gethostname()
        if rec.get("pid") is not None and rec.get("host", host) != host:
            fcntl.flock(fd, fcntl.LOCK_UN)
            raise RunDirBusy(f"run_dir {str(run_dir)!r} is locked by a run on another machine ({_holder(rec)}); "
                             f"if that run is gone, delete {path} and start again")
        if rec.get("pid") is not None:  # we hold the lock, so its recorded holder died without releasing it
            why = "is no longer running" if not _pid_alive(int(rec["pid"])) else "no longer holds it (the pid was reused)"
            warnings.warn(f"run_dir {str(run_dir)!r}: taking over the lock of {_holder(rec)}, which {why}",
                          StaleLockWarning, stacklevel=3)
        started = datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")
        data = json.dumps({"pid": os.getpid(), "host": host, "started": started}).encode()
        try:
            os.ftruncate(fd, 0)
            os.lseek(fd, 0, os.SEEK_SET)
            os.write(fd, data)
        except OSError as e:
            fcntl.flock(fd, fcntl.LOCK_UN)
            raise write_failed(e, path=path, run_dir=run_dir, what="the lock record", need_bytes=len(data)) from None
        try:
            yield path
        except BaseException:
            failed = True
            raise
        finally:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)  # an empty record: released cleanly
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)
        if created and failed:  # a run that failed before writing anything leaves no directory behind
            with contextlib.suppress(OSError):
                if [p.name for p in run_dir.iterdir()] == [LOCK_NAME]:
                    path.unlink()
                    run_dir.rmdir()


# ----------------------------------------------------------------------------- failed writes
def _free_bytes(path: Path) -> int | None:
    for p in (path, *path.parents):
        if p.exists():
            try:
                return shutil.disk_usage(p).free
            except OSError:
                return None
    return None


def _size(n: int) -> str:
    for unit, div in (("GB", 1 << 30), ("MB", 1 << 20), ("kB", 1 << 10)):
        if n >= div:
            return f"{n / div:.1f} {unit}"
    return f"{n} bytes"


def _cause(err: BaseException) -> str:
    if isinstance(err, OSError) and err.strerror:
        return err.strerror
    if isinstance(err, RuntimeError):  # torch's serializer: "[enforce fail at inline_container.cc] unexpected pos"
        return "the file stream failed part-way"
    text = str(err).strip()
    return text.splitlines()[0][:160] if text else type(err).__name__


def _release(err: BaseException) -> None:
    """Drop what the failed frames hold: a writer still open there keeps its deleted file's space in use."""
    seen: set[int] = set()
    while err is not None and id(err) not in seen:
        seen.add(id(err))
        if err.__traceback__ is not None:
            traceback.clear_frames(err.__traceback__)
        err = err.__cause__ or err.__context__
    gc.collect()


def write_failed(err: BaseException, *, path: str | Path, run_dir: str | Path | None, what: str,
                 need_bytes: int | None = None, removed: str | Path | None = None) -> WriteFailed:
    """The one-line :class:`WriteFailed` for ``err`` while writing ``what`` at ``path`` (raise it ``from None``).

    Names the path, the bytes needed when known, the free space, the removed temporary folder,
    the last verified checkpoint of ``run_dir`` and what to do.
    """
    path = Path(path)
    _release(err)
    free = _free_bytes(path)
    cause = _cause(err)
    if isinstance(err, RuntimeError) and need_bytes and free is not None and free < need_bytes:
        cause = "no space left on the device"  # torch's stream error on a disk that cannot hold the file
    # a stream error without an errno (torch's writer) is most likely a full disk; an OSError says what it is
    full = not isinstance(err, OSError) or getattr(err, "errno", None) in (errno.ENOSPC, errno.EDQUOT)
    parts = [f"could not write {what} {path} ({cause})"]
    space = [f"about {_size(need_bytes)} needed" if need_bytes else "", f"{_size(free)} free" if free is not None else ""]
    if any(space) and full:  # a file in the way or a permission: the free space is no cause
        parts.append(", ".join(s for s in space if s) + f" on {_mount_of(path)}")
    if removed is not None:
        parts.append(f"the unfinished {removed} was removed")
    if run_dir is not None:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ckpt = latest_checkpoint(run_dir)
        except CheckpointError:
            ckpt = None
        parts.append(f"the last verified checkpoint is {ckpt}" if ckpt is not None else "no checkpoint was written yet")
    parts.append(("free space" if full else f"fix what blocks {path} ({cause})") + " and rerun with --resume")
    return WriteFailed("; ".join(parts))


def _mount_of(path: Path) -> str:
    p = path if path.exists() else next((q for q in path.parents if q.exists()), path)
    p = p.resolve()
    while not os.path.ismount(p) and p != p.parent:
        p = p.parent
    return str(p)


def is_write_error(err: BaseException) -> bool:
    """An error a write can raise: any OSError, torch's serializer failing on its stream (its RuntimeError), or
    safetensors' writer failing on the file (its SafetensorError, a plain Exception quoting the OS error)."""
    if isinstance(err, (WriteFailed, RunDirBusy)):
        return False
    if isinstance(err, OSError):
        return True
    text = str(err)
    if type(err).__name__ == "SafetensorError":  # "Error while serializing: I/O error: No space left on device (os error 28)"
        return "I/O error" in text or "os error" in text
    return isinstance(err, RuntimeError) and any(s in text for s in ("inline_container", "iostream", "file write", "PytorchStreamWriter"))
