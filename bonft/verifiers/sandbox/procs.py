"""/proc scans, process cleanup and directory removal for the sandbox (Linux)."""
from __future__ import annotations

import errno
import os
import signal
import stat
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

    import subprocess  # here: the pool's workers load this module and fork from it, lighter without

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


_DIR_FLAGS = os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | os.O_CLOEXEC
_FS_IOC_GETFLAGS, _FS_IOC_SETFLAGS, _FS_IMMUTABLE_FL, _FS_APPEND_FL = 0x80086601, 0x40086602, 0x10, 0x20


def _clear_flags(fd: int) -> None:
    """Clear the immutable and append-only attributes (chattr(1), ioctl_iflags(2)) of an open file."""
    import array
    import fcntl

    buf = array.array("i", [0])
    try:
        fcntl.ioctl(fd, _FS_IOC_GETFLAGS, buf, True)
        if buf[0] & (_FS_IMMUTABLE_FL | _FS_APPEND_FL):
            buf[0] &= ~(_FS_IMMUTABLE_FL | _FS_APPEND_FL)
            fcntl.ioctl(fd, _FS_IOC_SETFLAGS, buf, True)
    except OSError:
        pass


def _unlock(dir_fd: int, name: str | None) -> None:
    """After EACCES/EPERM: give the directory (and the entry ``name`` in it) back rights and clear
    their immutable/append-only flags, as far as we may."""
    try:
        os.fchmod(dir_fd, 0o700)
    except OSError:
        pass
    _clear_flags(dir_fd)
    if name is None:
        return
    try:  # a directory without read or search rights: give them back through its parent
        if stat.S_ISDIR(os.stat(name, dir_fd=dir_fd, follow_symlinks=False).st_mode):
            os.chmod(name, 0o700, dir_fd=dir_fd)
    except OSError:
        pass
    try:
        fd = os.open(name, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC, dir_fd=dir_fd)
    except OSError:
        return  # a symlink, socket or file we cannot open: its flags cannot be set either
    try:
        _clear_flags(fd)
        if stat.S_ISDIR(os.fstat(fd).st_mode):
            os.fchmod(fd, 0o700)
    except OSError:
        pass
    finally:
        os.close(fd)


def _retry(op, dir_fd: int, name: str, **kw):
    try:
        return op(name, dir_fd=dir_fd, **kw)
    except PermissionError:
        _unlock(dir_fd, name)
        return op(name, dir_fd=dir_fd, **kw)


def remove_tree(top: str) -> None:
    """Remove the directory ``top`` and everything under it, whatever a candidate left there.

    No recursion and no long paths: one directory descriptor at a time, each entry named relative to
    it (so a chain 3000 directories deep, far past PATH_MAX, goes like any other), climbing back up
    through "..". Symlinks are removed, never followed; fifos and sockets are unlinked, never opened
    for I/O. Missing permissions are given back and immutable/append-only flags cleared where the
    caller may. Raises OSError naming the entry that could not be removed; a missing ``top`` is fine.
    """
    try:  # most candidates leave nothing: one system call
        os.rmdir(top)
        return
    except FileNotFoundError:
        return
    except OSError:
        pass  # not empty, or a permission or flag in the way: the walk below
    try:
        fd = os.open(top, _DIR_FLAGS)
    except FileNotFoundError:
        return
    except PermissionError:
        os.chmod(top, 0o700)
        fd = os.open(top, _DIR_FLAGS)
    names: list[str] = []  # the current directory, as names below top
    try:
        while True:
            child, seen = None, False
            with os.scandir(fd) as entries:
                for e in entries:
                    seen = True
                    if e.is_dir(follow_symlinks=False):
                        child = e.name
                        break
                    _retry(os.unlink, fd, e.name)
            if child is not None:
                sub = _retry(os.open, fd, child, flags=_DIR_FLAGS)
                os.close(fd)
                fd = sub
                names.append(child)
                continue
            if seen:
                continue  # list again: entries removed during a listing may hide others
            if not names:
                break
            parent = os.open("..", _DIR_FLAGS, dir_fd=fd)
            os.close(fd)
            fd = parent
            _retry(os.rmdir, fd, names.pop())
    except OSError as e:
        raise OSError(e.errno or errno.EIO, f"could not remove {e.filename or 'an entry'} {len(names)} levels "
                      f"below {top}: {e.strerror}") from None
    finally:
        os.close(fd)
    try:
        os.rmdir(top)
    except PermissionError:  # top itself immutable: clear it and try once more
        _clear_flags_path(top)
        os.rmdir(top)


def _clear_flags_path(path: str) -> None:
    try:
        fd = os.open(path, _DIR_FLAGS)
    except OSError:
        return
    try:
        _clear_flags(fd)
    finally:
        os.close(fd)
