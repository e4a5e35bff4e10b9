"""The OS layer of the sandbox: what a sandboxed process gets between fork and exec (Linux).

``make_preexec`` returns the function ``subprocess.Popen`` runs in the child
before exec: resource limits, parent-death signal, and as root a private
mount namespace (fresh tmpfs on /tmp, /var/tmp, /dev/shm, /run/lock, see
mount_namespaces(7) and tmpfs(5)), an empty network namespace
(network_namespaces(7)), the drop to an unprivileged uid and ``no_new_privs``
(prctl(2)). What took effect is written, one letter each, to ``report_fd``:
``m`` private tmp dirs, ``n`` network namespace, ``u`` own uid.
"""
from __future__ import annotations

import ctypes
import math
import os
import resource
import signal

CLONE_NEWNS, CLONE_NEWNET = 0x00020000, 0x40000000
MS_NOSUID, MS_NODEV, MS_BIND, MS_REC, MS_PRIVATE = 2, 4, 4096, 16384, 1 << 18
PR_SET_PDEATHSIG, PR_SET_NO_NEW_PRIVS = 1, 38
PRIVATE_DIRS = ("/tmp", "/var/tmp", "/dev/shm", "/run/lock")
LAYER_NAMES = {"u": "own-uid", "n": "no-network", "m": "private-tmp"}


class MountSetupError(RuntimeError):
    """The private mount namespace could not be set up (the runner falls back without it)."""


def private_dirs() -> list[str]:
    """The shared writable directories that get a fresh tmpfs: those that exist, by real path."""
    out = []
    for d in PRIVATE_DIRS:
        real = os.path.realpath(d)
        if os.path.isdir(real) and real not in out:
            out.append(real)
    return out


def rlimits(*, cpu_time: float, memory_mb: int, file_size_mb: int, nproc: int) -> list[tuple[int, tuple[int, int]]]:
    cpu = math.ceil(cpu_time)
    return [
        (resource.RLIMIT_CPU, (cpu, cpu + 1)),
        (resource.RLIMIT_AS, (memory_mb << 20,) * 2),
        (resource.RLIMIT_FSIZE, (file_size_mb << 20,) * 2),
        (resource.RLIMIT_CORE, (0, 0)),
        (resource.RLIMIT_NPROC, (nproc, nproc)),
    ]


def make_preexec(*, limits, uid: int | None, libc, netns: bool, mountns: bool, workdir: str,
                 tmpfs_mb: int, report_fd: int | None):
    """The child-side setup; raises :class:`MountSetupError` when the mount namespace half-fails."""
    dirs = [os.fsencode(d) for d in private_dirs()] if mountns else []
    real = os.path.realpath(workdir)
    bind = next((os.fsencode(real) for d in dirs if real.startswith(os.fsdecode(d) + os.sep)), None)
    opts = b"size=%dk,nr_inodes=4096,mode=1777" % (max(1, tmpfs_mb) << 10)
    if libc is not None:
        libc.mount.argtypes = [ctypes.c_char_p, ctypes.c_char_p, ctypes.c_char_p, ctypes.c_ulong, ctypes.c_char_p]
        libc.unshare.argtypes = [ctypes.c_int]

    def fn() -> None:  # runs in the child between fork and exec: no imports, no locks
        for res, val in limits:
            resource.setrlimit(res, val)
        done = b""
        if libc is not None:
            libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
            if dirs and libc.unshare(CLONE_NEWNS) == 0:
                if libc.mount(None, b"/", None, MS_REC | MS_PRIVATE, None) != 0:
                    raise MountSetupError("mount --make-rprivate / failed")
                for d in dirs:
                    if libc.mount(b"tmpfs", d, b"tmpfs", MS_NOSUID | MS_NODEV, opts) != 0:
                        raise MountSetupError("tmpfs on %s failed" % os.fsdecode(d))
                if bind is not None:  # the working directory lives under a hidden dir: bind it back
                    os.makedirs(bind, 0o700)
                    if libc.mount(b"/proc/self/cwd", bind, None, MS_BIND, None) != 0:
                        raise MountSetupError("bind of the working directory failed")
                    os.chdir(bind)
                done += b"m"
            if netns and libc.unshare(CLONE_NEWNET) == 0:
                done += b"n"
        if uid is not None:
            os.setgroups([])
            os.setgid(uid)
            os.setuid(uid)
            done += b"u"
        if libc is not None:
            libc.prctl(PR_SET_NO_NEW_PRIVS, 1, 0, 0, 0)
        if report_fd is not None:
            os.write(report_fd, done)
            os.close(report_fd)

    return fn


def env(workdir: str) -> dict[str, str]:
    """An environment built from scratch: nothing of the parent's is inherited (no API keys)."""
    return {
        "PATH": "/usr/local/bin:/usr/bin:/bin", "HOME": workdir, "TMPDIR": workdir,
        "LANG": "C.UTF-8", "LC_ALL": "C.UTF-8", "PYTHONHASHSEED": "0",
        "PYTHONDONTWRITEBYTECODE": "1", "PYTHONNOUSERSITE": "1", "PYTHONIOENCODING": "utf-8",
    }
