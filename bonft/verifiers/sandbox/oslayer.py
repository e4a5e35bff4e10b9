"""The OS layer of the sandbox: what a sandboxed process gets between fork and exec (Linux).

``make_preexec`` returns the function ``subprocess.Popen`` runs in the child
before exec: resource limits, parent-death signal, and as root a private
mount namespace (fresh tmpfs on /tmp, /var/tmp, /dev/shm, /run/lock, see
mount_namespaces(7) and tmpfs(5)), a fresh PID namespace with its own /proc
(pid_namespaces(7)), a fresh IPC namespace (ipc_namespaces(7): System V
objects and POSIX message queues die with it), an empty network namespace
(network_namespaces(7)), the drop to an unprivileged uid and ``no_new_privs``
(prctl(2)); as root or not, a seccomp filter (seccomp(2)) that refuses user
namespaces (``unshare`` and ``clone`` with CLONE_NEWUSER; ``clone3``, whose
flags a filter cannot read, answers ENOSYS and the C library falls back to
``clone``). What took effect is written, one letter each, to ``report_fd``:
``m`` private tmp dirs, ``p`` PID namespace, ``i`` IPC namespace, ``n``
network namespace, ``u`` own uid, ``s`` the user-namespace filter.

The PID namespace: the process Popen started (the waiter) unshares
CLONE_NEWPID and forks the namespace's init, which forks the candidate's
process (PID 2: not an init, so its signals, SIGXCPU and its own kill(2)
included, act as usual) and then only reaps. Waiter and init stay root, so
the candidate cannot signal them. When the candidate's process ends, the init
passes its wait status to the waiter and exits, and the kernel kills and
reaps every other process of the namespace: no zombie, orphan or daemon
outlives the run or keeps counting against the uid's process limit; the
waiter ends the way the candidate's process did. SIGTERM to the waiter ends a
run: it kills the init (and so the namespace) and reaps it. A SIGKILL to the
waiter kills the rest too, by parent-death signals, but leaves the init's
exit status to the host's init.
"""
from __future__ import annotations

import ctypes
import math
import os
import resource
import signal
import struct

CLONE_NEWNS, CLONE_NEWNET, CLONE_NEWIPC, CLONE_NEWPID, CLONE_NEWUSER = (
    0x00020000, 0x40000000, 0x08000000, 0x20000000, 0x10000000)
MS_NOSUID, MS_NODEV, MS_NOEXEC, MS_BIND, MS_REC, MS_PRIVATE = 2, 4, 8, 4096, 16384, 1 << 18
PR_SET_PDEATHSIG, PR_SET_NO_NEW_PRIVS, PR_SET_SECCOMP, SECCOMP_MODE_FILTER = 1, 38, 22, 2
PRIVATE_DIRS = ("/tmp", "/var/tmp", "/dev/shm", "/run/lock")
LAYER_NAMES = {"u": "own-uid", "n": "no-network", "m": "private-tmp", "p": "private-pids", "i": "private-ipc",
               "s": "no-userns"}
# seccomp(2): the audit architecture and the numbers of clone, unshare and clone3 (asm/unistd.h)
_ARCHES = {"x86_64": (0xC000003E, 56, 272, 435), "aarch64": (0xC00000B7, 220, 97, 435)}


def userns_filter():
    """A classic BPF program for seccomp(2): ``unshare``/``clone`` with CLONE_NEWUSER -> EPERM,
    ``clone3`` -> ENOSYS, calls of another architecture (x86 32-bit, x32) -> EPERM, the rest allowed.
    None where the machine's architecture is not known here."""
    arch = _ARCHES.get(os.uname().machine)
    if arch is None:
        return None
    audit, clone, unshare, clone3 = arch
    ld, jeq, jge, jset, ret = 0x20, 0x15, 0x35, 0x45, 0x06  # BPF_LD|W|ABS, BPF_JMP|JEQ/JGE/JSET|K, BPF_RET|K
    allow, deny, enosys = 0x7FFF0000, 0x00050000 | 1, 0x00050000 | 38  # SECCOMP_RET_ALLOW, RET_ERRNO | errno
    prog = [
        (ld, 0, 0, 4),                      # 0: arch
        (jeq, 0, 9, audit),                 # 1: another architecture -> 11
        (ld, 0, 0, 0),                      # 2: syscall number
        (jge, 7, 0, 0x40000000),            # 3: x32 numbers -> 11
        (jeq, 7, 0, clone3),                # 4: -> 12
        (jeq, 2, 0, unshare),               # 5: -> 8
        (jeq, 1, 0, clone),                 # 6: -> 8
        (ret, 0, 0, allow),                 # 7
        (ld, 0, 0, 16),                     # 8: low half of the first argument (the flags)
        (jset, 1, 0, CLONE_NEWUSER),        # 9: -> 11
        (ret, 0, 0, allow),                 # 10
        (ret, 0, 0, deny),                  # 11
        (ret, 0, 0, enosys),                # 12
    ]
    code = b"".join(struct.pack("=HBBI", *ins) for ins in prog)
    buf = ctypes.create_string_buffer(code, len(code))

    class Prog(ctypes.Structure):
        _fields_ = [("len", ctypes.c_ushort), ("filter", ctypes.c_void_p)]

    return Prog(len(prog), ctypes.addressof(buf)), buf  # keep buf alive with the program


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


def _only_fds(*keep: int) -> None:
    """Point 0, 1, 2 at /dev/null and close every other descriptor but ``keep``: the output pipes and
    the exec-error pipe must be held by the candidate's process alone, or their readers never see EOF."""
    null = os.open(os.devnull, os.O_RDWR)
    for fd in (0, 1, 2):
        os.dup2(null, fd)
    low = 3
    for fd in sorted(keep):
        os.closerange(low, fd)
        low = fd + 1
    os.closerange(low, 1 << 16)


def _ns_init(child: int, status_w: int) -> None:
    """PID 1 of the namespace: reap whatever ends; when ``child`` (the candidate's process) ends, send its
    wait status on ``status_w`` and exit, and the kernel kills the namespace's other processes. Never returns."""
    try:
        _only_fds(status_w)
        reap_until(child, status_w)
    finally:
        os._exit(255)


def reap_until(child: int, status_w: int) -> None:
    """The loop of a PID namespace's init: reap whatever ends; when ``child`` ends, write its wait status
    to ``status_w`` and exit (0; also when no child is left). Never returns."""
    while True:
        try:
            pid, status = os.wait()
        except ChildProcessError:
            os._exit(0)
        if pid == child:
            os.write(status_w, struct.pack("=i", status))
            os._exit(0)


def _wait_and_mirror(init: int, status_r: int, libc) -> None:
    """The waiter outside the namespace: wait for its init, then end the way the candidate's process
    ended (its status comes on ``status_r``; the init's own if none came). SIGTERM makes it SIGKILL the
    init first: the runner's way to end a run, which takes every process of the namespace with it and
    leaves no zombie of the sandbox uid behind. Never returns."""
    try:
        _only_fds(status_r)
        signal.pthread_sigmask(signal.SIG_BLOCK, [signal.SIGTERM, signal.SIGCHLD])
        while True:
            done, status = os.waitpid(init, os.WNOHANG)
            if done == init:
                break
            if signal.sigwait([signal.SIGTERM, signal.SIGCHLD]) == signal.SIGTERM:
                os.kill(init, signal.SIGKILL)
        data = os.read(status_r, 4)
        if len(data) == 4:
            status = struct.unpack("=i", data)[0]
        if os.WIFSIGNALED(status):
            sig = os.WTERMSIG(status)
            libc.signal(sig, None)  # SIG_DFL
            signal.pthread_sigmask(signal.SIG_UNBLOCK, [sig])
            os.kill(os.getpid(), sig)
            os._exit(128 + sig)
        os._exit(os.WEXITSTATUS(status) if os.WIFEXITED(status) else 255)
    finally:
        os._exit(255)


def layer_plan(*, mountns: bool, tmpfs_mb: int, deny_userns: bool, libc):
    """What :func:`apply_layers` needs that can be prepared once, before any fork: the private
    directories, the tmpfs options and the seccomp program (``(dirs, opts, filt)``)."""
    dirs = [os.fsencode(d) for d in private_dirs()] if mountns else []
    opts = b"size=%dk,nr_inodes=4096,mode=1777" % (max(1, tmpfs_mb) << 10)
    filt = userns_filter() if deny_userns and libc is not None else None
    if libc is not None:
        libc.mount.argtypes = [ctypes.c_char_p, ctypes.c_char_p, ctypes.c_char_p, ctypes.c_ulong, ctypes.c_char_p]
        libc.unshare.argtypes = [ctypes.c_int]
        libc.signal.argtypes = [ctypes.c_int, ctypes.c_void_p]
    return dirs, opts, filt


def bind_target(dirs, workdir: str):
    """The working directory's path when it lives under one of the private ``dirs`` (it is bound back
    into the fresh tmpfs there), else None."""
    real = os.path.realpath(workdir)
    return next((os.fsencode(real) for d in dirs if real.startswith(os.fsdecode(d) + os.sep)), None)


def apply_layers(*, limits, uid, libc, netns: bool, ipcns: bool, dirs, bind, opts, filt, done: bytes = b"") -> bytes:
    """The layers after the PID namespace, in the process that will run the code (cwd = its working
    directory): resource limits, the private mount namespace (and the PID namespace's own /proc when
    ``done`` holds ``p``), IPC and network namespaces, the uid drop, ``no_new_privs``, the seccomp
    filter. Returns ``done`` plus the letters of what took effect; raises :class:`MountSetupError`."""
    for res, val in limits:
        resource.setrlimit(res, val)
    if libc is not None:
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
        if b"p" in done:  # the namespace's own /proc: its pids, none of the host's processes
            if b"m" not in done or libc.mount(b"proc", b"/proc", b"proc", MS_NOSUID | MS_NODEV | MS_NOEXEC,
                                              None) != 0:
                raise MountSetupError("/proc for the PID namespace failed")
        if ipcns and libc.unshare(CLONE_NEWIPC) == 0:
            done += b"i"
        if netns and libc.unshare(CLONE_NEWNET) == 0:
            done += b"n"
    if uid is not None:
        os.setgroups([])
        os.setgid(uid)
        os.setuid(uid)
        done += b"u"
    if libc is not None:
        libc.prctl(PR_SET_NO_NEW_PRIVS, 1, 0, 0, 0)
        if filt is not None and libc.prctl(PR_SET_SECCOMP, SECCOMP_MODE_FILTER, ctypes.byref(filt[0]), 0, 0) == 0:
            done += b"s"
    return done


def make_preexec(*, limits, uid: int | None, libc, netns: bool, mountns: bool, workdir: str,
                 tmpfs_mb: int, report_fd: int | None, pidns: bool = False, ipcns: bool = False,
                 deny_userns: bool = False):
    """The child-side setup; raises :class:`MountSetupError` when the mount or PID namespace half-fails.
    ``pidns`` needs ``mountns`` (the namespace gets its own /proc)."""
    dirs, opts, filt = layer_plan(mountns=mountns, tmpfs_mb=tmpfs_mb, deny_userns=deny_userns, libc=libc)
    bind = bind_target(dirs, workdir)

    def fn() -> None:  # runs in the child between fork and exec: no imports, no locks
        done = b""
        if libc is not None:
            libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
            if pidns and dirs and libc.unshare(CLONE_NEWPID) == 0:
                status_r, status_w = os.pipe()
                init = os.fork()
                if init != 0:
                    _wait_and_mirror(init, status_r, libc)
                libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)  # not inherited across fork
                child = os.fork()
                if child != 0:
                    _ns_init(child, status_w)
                os.close(status_r)
                os.close(status_w)
                libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
                done += b"p"
        done = apply_layers(limits=limits, uid=uid, libc=libc, netns=netns, ipcns=ipcns, dirs=dirs, bind=bind,
                            opts=opts, filt=filt, done=done)
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
