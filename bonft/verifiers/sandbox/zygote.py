"""Bootstrap of a sandbox pool worker (``python -c <loader> SANDBOX_DIR CTL_FD RESULT_FD``).

Not imported by the library: :class:`~bonft.verifiers.sandbox.pool.SandboxPool` starts
one such process per worker, as root when the caller is, with a scrubbed
environment; its ``-c`` text (``pool._LOADER``) compiles this file in a
throwaway child and runs the code, and this file uses the loader's
``_compiled`` in turn for everything else it compiles, so that the parser's
scratch memory (which the allocator keeps after a compile: 3.6 of the 9.4 MB of
private memory the worker had when it compiled them itself)
is never copied into a fork. It loads the sandbox's own modules (``wire``,
``oslayer``, ``outcome``, ``procs``) from SANDBOX_DIR, builds the two
bootstraps (``wire.py`` + ``candidate.py``, ``wire.py`` + ``judge.py``) once,
prepares the seccomp program, and then splits in two for good:

* the **forker** (the worker process itself, whose pid the pool knows) never
  reads a job, an output, a verdict, a name left in a job's directory or (with
  a PID namespace) the candidate's exit status: it only receives short
  commands from the supervisor (``fork SEQ run``, ``end SEQ``; ``killcand
  SEQ`` without a PID namespace) on a unix socket of their own. Per job it
  makes the two directories and the pipes,
  forks the tests' process (its own session, uid, limits, ``no_new_privs``)
  and, as root, unshares a PID namespace, forks the namespace's init (which
  starts the candidate's process as PID 2, with the same layers as a
  one-at-a-time run, :func:`~bonft.verifiers.sandbox.oslayer.apply_layers`)
  and joins its own PID namespace again (setns(2), so the next job can
  unshare a fresh one); it hands the parent ends of the pipes (the init's
  status pipe among them) and the directories' paths to the supervisor
  (SCM_RIGHTS, unix(7)), closes its copies, reports when each of its two
  children ends, and on ``end`` kills what is left and reaps it;
* the **supervisor** (forked once, before any job) reads the jobs from the
  control pipe, feeds the solution and the tests to the two processes on
  their pipes, reads both processes' output and the verdict exactly as a
  one-at-a-time run does (``outcome.collect`` and ``outcome.classify``),
  removes the two directories and writes the result frame to the result
  pipe. It **never forks**: every job's text, output, verdict and leftover
  names pass through its memory, and no process is ever made from that memory. Every candidate is a fork of the forker, which holds
  nothing but modules and code. The supervisor is non-dumpable and dies with
  the forker (parent-death signal).

So a candidate costs three processes (tests, init, candidate), no interpreter
start and no per-job supervisor. A supervisor that dies gives its candidate
in flight a ``crashed`` frame naming the cause (written by the forker, which
then exits so that the pool starts a fresh worker). A command ``fork SEQ
bare`` runs the floor: one process of the forker with the candidate's layers
in a fresh working directory (the PID namespace's PID 1 itself), doing nothing.
"""
import array
import builtins
import gc
import os
import select
import signal
import socket
import struct
import sys
import time
import traceback
import types

_HERE = sys.argv[1]
_CTL, _RES = int(sys.argv[2]), int(sys.argv[3])
PR_SET_DUMPABLE = 4


def _read(name):
    with open(os.path.join(_HERE, name), encoding="utf-8") as f:
        return f.read()


def _boot_text(name):
    """The text of a bootstrap as ``python -c`` runs it one at a time (``wire.py`` + ``name``), less its
    final call to ``_main``: a forked child makes that call."""
    text = _read("wire.py") + "\n" + _read(name)
    guard = '\nif __name__ == "__main__":\n'
    if guard not in text:
        raise RuntimeError("%s has no main guard" % name)
    prelude = "import sys\nif sys.path and sys.path[0] in ('', '.'):\n    del sys.path[0]\n"
    return prelude + text[:text.rindex(guard)]


_MODULES = ("wire", "oslayer", "outcome", "procs")
# every text compiled at once, in a child (_compiled: the loader's, in pool.py)
_CODE = dict(zip(_MODULES + ("candidate.py", "judge.py"), _compiled(  # noqa: F821 - defined by the loader
    [(_read(m + ".py"), os.path.join(_HERE, m + ".py")) for m in _MODULES]
    + [(_boot_text(b), "<string>") for b in ("candidate.py", "judge.py")])))


def _load(name):
    """The sandbox module ``name`` from its file, without the package (whose imports a worker does not
    need: every module loaded here is copied into every fork)."""
    mod = types.ModuleType("bonft_sandbox_" + name)
    mod.__file__ = os.path.join(_HERE, name + ".py")
    sys.modules[mod.__name__] = mod
    exec(_CODE.pop(name), mod.__dict__)
    return mod


wire, oslayer, outcome, procs = _load("wire"), _load("oslayer"), _load("outcome"), _load("procs")
# the compiler's own state, made at its first use in a process: made here, once (not in every child
# that compiles a solution or tests, where it copied about 115 pages of this process)
compile("x = 1\n", "<string>", "exec")
import ctypes  # noqa: E402 - after the sandbox modules, which import it too
import json  # noqa: E402

for _name in ("base64", "collections", "errno", "io"):
    __import__(_name)  # what the bootstraps import: every fork starts with it loaded (not fractions or
    # decimal, which only some candidates need: every page of the worker makes each fork dearer)


def _mkdtemp(prefix, where):
    """A new directory of mode 0700 (tempfile.mkdtemp, without loading tempfile and random)."""
    while True:
        path = os.path.join(where, prefix + os.urandom(6).hex())
        try:
            os.mkdir(path, 0o700)
            return path
        except FileExistsError:
            continue


def _boot_module(name):
    """The ``__main__`` module of a bootstrap (``wire.py`` + ``name``) with everything it defines, made
    once here: a forked child only calls its ``_main``, as ``python -c`` would at the text's end, instead
    of building its functions and classes again (each new object is a page copied from the worker)."""
    mod = types.ModuleType("__main__")
    mod.__dict__["__builtins__"] = builtins
    exec(_CODE.pop(name), mod.__dict__)
    return mod


class _Child:
    """A child of the forker, read like the runner's ``subprocess.Popen``: ``poll``, ``wait``,
    ``returncode`` (minus the signal number when killed). For the init of a PID namespace the
    candidate's own wait status comes on ``status_r`` (the init's otherwise). Its output pipes are
    the supervisor's: the forker never reads them.

    The exit status is read without reaping (waitid(2) with WNOWAIT); ``reap`` reaps. Until then the
    ended child stays a zombie, so its pid, and the id of the process group it led, cannot have been
    given to another process: killing by that number reaches only what is left of this job."""

    def __init__(self, pid, status_r=None):
        self.pid, self.returncode, self._status_r, self._reaped = pid, None, status_r, False
        try:
            self.pidfd = os.pidfd_open(pid)
        except (AttributeError, OSError):
            self.pidfd = None

    def _done(self, status):
        if self._status_r is not None:
            data = b""
            try:
                data = os.read(self._status_r, 4)
            except OSError:
                pass
            os.close(self._status_r)
            self._status_r = None
            if len(data) == 4:
                status = struct.unpack("=i", data)[0]
        if os.WIFSIGNALED(status):
            self.returncode = -os.WTERMSIG(status)
        else:
            self.returncode = os.WEXITSTATUS(status) if os.WIFEXITED(status) else 255
        if self.pidfd is not None:
            os.close(self.pidfd)
            self.pidfd = None

    def poll(self):
        if self.returncode is None:
            try:
                info = os.waitid(os.P_PID, self.pid, os.WEXITED | os.WNOHANG | os.WNOWAIT)
            except ChildProcessError:
                self._reaped = True
                self._done(255 << 8)
                return self.returncode
            if info is not None:
                code = info.si_code
                self._done(info.si_status << 8 if code == os.CLD_EXITED else info.si_status & 0x7F)
        return self.returncode

    def wait(self):
        while self.poll() is None:
            if self.pidfd is not None:
                select.select([self.pidfd], [], [], 1.0)
            else:
                time.sleep(0.002)
        return self.returncode

    def reap(self):
        """Wait for the child to end, then let its zombie go (and with it its pid)."""
        self.wait()
        if not self._reaped:
            self._reaped = True
            try:
                os.waitpid(self.pid, 0)
            except ChildProcessError:
                pass


class Worker:
    def __init__(self, cfg):
        self.cfg = cfg
        self.root = bool(cfg["root"])
        self.cuid, self.juid = cfg["cuid"], cfg["juid"]
        self.libc = ctypes.CDLL(None, use_errno=True)
        self.mountns, self.pidns = bool(cfg["mountns"]), bool(cfg["pidns"])
        self.limits = [(int(r), (int(s), int(h))) for r, s, h in cfg["limits"]]
        self.cand_boot, self.judge_boot = _boot_module("candidate.py"), _boot_module("judge.py")
        self.tmp = cfg["tmp"]
        self.pid = os.getpid()  # the worker's: its directories carry it, so the pool can sweep them if it dies
        self.own_pidns = os.open("/proc/self/ns/pid", os.O_RDONLY | os.O_CLOEXEC) if self.pidns else -1
        self.libc.setns.argtypes = [ctypes.c_int, ctypes.c_int]
        for name in ("prctl", "unshare", "mount", "setns"):
            getattr(self.libc, name)  # looked up here, once: a child that first looks one up builds its
            # function object (about 80 pages copied in every child)
        self._plan()
        self.env_vary = self._base_env(self.tmp)

    @staticmethod
    def _base_env(where):
        """Make the forker's environment a job's (:func:`oslayer.env`) but for the variables naming the
        working directory, and return those: a child then sets only them, and its ``os.environ`` (keys,
        values, order) and C environment equal a fresh interpreter's started with ``oslayer.env(workdir)``.
        Rebuilding the whole environment in every child copied about 70 more pages per process."""
        one, other = oslayer.env(where), oslayer.env(where + "/x")
        if list(os.environ.items()) != list(one.items()):  # the pool starts the worker with oslayer.env(tmp)
            os.environ.clear()
            os.environ.update(one)
        return tuple(k for k in one if one[k] != other[k])

    def _plan(self):
        self.dirs, self.opts, self.filt = oslayer.layer_plan(
            mountns=self.mountns, tmpfs_mb=self.cfg["file_size_mb"], deny_userns=True, libc=self.libc)

    # -- children --------------------------------------------------------------------------
    def _limits(self):
        if self.cuid is not None:
            return self.limits
        nproc = procs.user_tasks(os.getuid()) + self.cfg["max_processes"]  # as the runner: all our processes
        return [(r, (nproc, nproc)) if r == oslayer.resource.RLIMIT_NPROC else (r, v) for r, v in self.limits]

    @staticmethod
    def _only(keep, out_w, err_w):
        """0 from /dev/null, 1 and 2 to the output pipes, every other descriptor but ``keep`` closed."""
        null = os.open(os.devnull, os.O_RDWR)
        os.dup2(null, 0)
        os.dup2(out_w, 1)
        os.dup2(err_w, 2)
        low = 3
        for fd in sorted(keep):
            os.closerange(low, fd)
            os.set_inheritable(fd, True)  # as the runner's pass_fds
            low = fd + 1
        os.closerange(low, 1 << 16)

    def _run_boot(self, main, fds, workdir):
        env = oslayer.env(workdir)
        for key in self.env_vary:  # the rest is the forker's own, set once (_base_env): fewer pages copied
            os.environ[key] = env[key]
        if "tempfile" in sys.modules:
            sys.modules["tempfile"].tempdir = None  # read from TMPDIR again, as a fresh interpreter would
        sys.modules["__main__"] = main
        sys.argv = ["-c"] + [str(fd) for fd in fds]
        status = 0
        try:
            main._main(*fds)
        except SystemExit as e:
            c = e.code
            if c is None or isinstance(c, int):
                status = c or 0
            else:
                print(c, file=sys.stderr)
                status = 1
        except BaseException:
            traceback.print_exc()
            status = 1
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except Exception:
                pass
        os._exit(status)

    def fork_judge(self, judgedir, keep, out_w, err_w):
        pid = os.fork()
        if pid:
            return pid
        try:
            self.libc.prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
            os.setsid()
            self._only(keep, out_w, err_w)
            os.chdir(judgedir)
            oslayer.apply_layers(limits=self._limits(), uid=self.juid, libc=self.libc, netns=False, ipcns=False,
                                 dirs=[], bind=None, opts=self.opts, filt=None)
            self._run_boot(self.judge_boot, keep, judgedir)
        finally:
            os._exit(127)

    def _restore_pidns(self):
        """Join the forker's own PID namespace again after a fork into a fresh one (setns(2)), so the
        next job can unshare another; a forker that cannot is of no further use."""
        if self.libc.setns(self.own_pidns, oslayer.CLONE_NEWPID) != 0:
            os.write(2, b"bonft sandbox worker: setns back to its own PID namespace failed\n")
            os._exit(5)

    def fork_candidate(self, workdir, keep, out_w, err_w, report_w, bare=False):
        """(pid to wait for, status pipe or None): as root the init of a fresh PID namespace. ``bare``
        (the floor): the process with every layer exits at once, and it is the namespace's PID 1 itself
        (no init forks it: the fewest processes these layers take)."""
        pid_layer = self.pidns and bool(self.dirs) and self.libc.unshare(oslayer.CLONE_NEWPID) == 0
        status_r = status_w = None
        try:
            if pid_layer and not bare:
                status_r, status_w = os.pipe()
            pid = os.fork()
        except OSError:
            if pid_layer:
                self._restore_pidns()
            for fd in (status_r, status_w):
                if fd is not None:
                    os.close(fd)
            raise
        if pid:
            if pid_layer:
                self._restore_pidns()
            if status_w is not None:
                os.close(status_w)
            return pid, status_r
        try:
            self.libc.prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
            os.setsid()
            done = b""
            if pid_layer and bare:
                done = b"p"
            elif pid_layer:
                child = os.fork()
                if child != 0:
                    _ns_init(child, status_w)
                os.close(status_r)
                os.close(status_w)
                self.libc.prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
                done = b"p"
            self._only(tuple(keep) + (report_w,), out_w, err_w)
            os.chdir(workdir)
            try:
                done = oslayer.apply_layers(
                    limits=self._limits(), uid=self.cuid, libc=self.libc, netns=bool(self.cfg["netns"]),
                    ipcns=self.root, dirs=self.dirs, bind=oslayer.bind_target(self.dirs, workdir), opts=self.opts,
                    filt=self.filt, done=done)
            except oslayer.MountSetupError as e:
                os.write(report_w, b"E" + str(e).encode("utf-8", "replace"))
                os._exit(127)
            if self.cuid is not None:
                self.libc.prctl(PR_SET_DUMPABLE, 1, 0, 0, 0)  # the uid change cleared it; an exec would set it
            os.write(report_w, done)
            os.close(report_w)
            if bare:
                os._exit(0)
            self._run_boot(self.cand_boot, keep, workdir)
        finally:
            os._exit(127)

    # -- one job -----------------------------------------------------------------------------
    def _mkdirs(self, seq, judge=True):
        tag = "%d.%d." % (self.pid, seq)
        workdir = _mkdtemp("bonft-sandbox-" + tag, self.tmp)
        judgedir = _mkdtemp("bonft-tests-" + tag, self.tmp) if judge else None
        if self.root:
            os.chown(workdir, self.cuid, self.cuid)
            if judgedir is not None:
                os.chown(judgedir, self.juid, self.juid)
        return workdir, judgedir

    def _kill_candidate(self, cand, in_pidns, workdir):
        """Kill what is left of the candidate (not yet reaped, so its pid is still its own): the
        namespace's init, or the group, then the uid or the directory."""
        if in_pidns:  # the namespace's init: its end takes every process of the namespace with it
            _kill(cand.pid, signal.SIGKILL)
            return
        _killpg(cand.pid)
        # the sweeps read /proc (process names, working directories: a candidate's data), so a child
        # does them: nothing read enters the memory later candidates are forked from
        pid = os.fork()
        if pid == 0:
            try:
                if self.cuid is not None:
                    for _ in range(50):
                        if not procs.pids_of(self.cuid):
                            break
                        procs.kill_uid(self.cuid)
                        time.sleep(0.01)
                else:
                    procs.kill_by_cwd(workdir)
            finally:
                os._exit(0)
        os.waitpid(pid, 0)

    def run_job(self, seq, sock):
        """Fork one job's two processes, hand their pipes and directories to the supervisor, report
        their exits, and on its ``end`` kill what is left and reap it. False when the supervisor is
        gone (the job's processes are then killed and reaped all the same). The forker never lists a
        directory a job used: the names a candidate or its tests left there are data, and every later
        candidate is forked from this process's memory; the supervisor removes them."""
        fds = set()
        judge = cand = None
        in_pidns = False
        workdir = judgedir = None
        alive, forked = True, False

        def pipe():
            r, w = os.pipe()
            fds.update((r, w))
            return r, w

        def close(*xs):
            for fd in xs:
                if fd in fds:
                    fds.discard(fd)
                    os.close(fd)

        try:
            try:
                workdir, judgedir = self._mkdirs(seq)
                (jcfg_r, jcfg_w), (ver_r, ver_w), (req_r, req_w), (rep_r, rep_w), (ccfg_r, ccfg_w) = [
                    pipe() for _ in range(5)]
                (jo_r, jo_w), (je_r, je_w), (co_r, co_w), (ce_r, ce_w), (lay_r, lay_w) = [pipe() for _ in range(5)]
                judge = _Child(self.fork_judge(judgedir, (jcfg_r, ver_w, req_w, rep_r), jo_w, je_w))
                cpid, status_r = self.fork_candidate(workdir, (ccfg_r, req_r, rep_w), co_w, ce_w, lay_w)
                in_pidns = status_r is not None
                if in_pidns:
                    fds.add(status_r)
                # with a PID namespace the candidate's own wait status goes to the supervisor, on the
                # pipe from the init: the forker learns only the init's, which no candidate controls
                cand = _Child(cpid)
                close(jcfg_r, ver_w, req_w, rep_r, ccfg_r, rep_w, jo_w, je_w, co_w, ce_w, lay_w)
            except OSError as e:
                alive = _send(sock, b"error %d %s" % (seq, str(e)[:300].encode("utf-8", "replace")))
            else:
                theirs = [jcfg_w, ver_r, jo_r, je_r, co_r, ce_r, ccfg_w, lay_r] + ([status_r] if in_pidns else [])
                dirs = os.fsencode(workdir) + b"\0" + os.fsencode(judgedir)
                alive = forked = _send(sock, b"forked %d %d %s" % (seq, in_pidns, dirs), theirs)
                close(*theirs)
                told = set()
                while alive:
                    for who, p in ((b"j", judge), (b"c", cand)):
                        if who not in told and p.poll() is not None:
                            alive = _send(sock, b"exit %d %s %d" % (seq, who, p.returncode))
                            told.add(who)
                    waits = [p.pidfd for p in (judge, cand) if p.returncode is None and p.pidfd is not None]
                    polling = any(p.returncode is None and p.pidfd is None for p in (judge, cand))
                    ready, _, _ = select.select([sock] + waits, [], [], 0.005 if polling else None)
                    if sock not in ready:
                        continue
                    cmd = _recv(sock)[0].split()
                    if not cmd:
                        alive = False
                    elif cmd[0] == b"killcand":
                        self._kill_candidate(cand, in_pidns, workdir)
                    elif cmd[0] == b"end":
                        break
        finally:
            if cand is not None:
                self._kill_candidate(cand, in_pidns, workdir)
            if judge is not None:
                _killpg(judge.pid)  # what the tests started, too
            rcs = [p.wait() if p is not None else None for p in (judge, cand)]
            for p in (judge, cand):
                if p is not None:
                    p.reap()
            close(*list(fds))
            if not forked:  # nothing ran in them: empty (the supervisor removes the others)
                for d in (workdir, judgedir):
                    if d is not None:
                        try:
                            os.rmdir(d)
                        except OSError:
                            pass  # the pool's sweep of this worker's directories takes it
        if alive and forked:
            alive = _send(sock, b"ended %d %d %d" % (seq, rcs[0], rcs[1]))
        return alive

    def bare(self, seq):
        """The floor: one process with the candidate's layers in a fresh working directory, doing
        nothing; returns the layers that took effect (or ``E`` and the set-up error)."""
        workdir, _ = self._mkdirs(seq, judge=False)
        lay_r, lay_w = os.pipe()
        out_r, out_w = os.pipe()
        try:
            pid, status_r = self.fork_candidate(workdir, (), out_w, out_w, lay_w, bare=True)
            os.close(lay_w)
            os.close(out_w)
            done = _read_to_eof(lay_r)
            _Child(pid, status_r).reap()
        finally:
            os.close(lay_r)
            os.close(out_r)
            procs.remove_tree(workdir)
        return done.decode("utf-8", "replace")

    def probe(self):
        """Fall back without the PID namespace, then without the mount namespace, while their set-up
        fails (a container may refuse them even to root); returns the layer letters that took effect.
        Each try runs in a child, so a namespace the forker could not leave again costs only the child."""
        while True:
            r, w = os.pipe()
            pid = os.fork()
            if pid == 0:
                try:
                    os.write(w, b"ok " + self.bare(0).encode("utf-8"))
                finally:
                    os._exit(0)
            os.close(w)
            done = _read_to_eof(r).decode("utf-8", "replace")
            os.close(r)
            os.waitpid(pid, 0)
            done = done[3:] if done.startswith("ok ") else "Ethe probe ended without a report"
            if not done.startswith("E"):
                return done
            if self.pidns:
                self.pidns = False
            elif self.mountns:
                self.mountns = False
                self._plan()
            else:
                return done


def _ns_init(child, status_w):
    """PID 1 of a job's PID namespace, as :func:`oslayer._ns_init` (reap whatever ends; when ``child``, the
    candidate's process, ends, send its wait status on ``status_w`` and exit: the kernel then kills the
    namespace's other processes), but it only closes descriptors: the forker's 0 and 1 are /dev/null
    already and 2 is its own stderr (the pool starts it so), and pointing them at /dev/null again copied
    pages in a process every candidate costs. Never returns."""
    try:
        os.closerange(3, status_w)
        os.closerange(status_w + 1, 1 << 16)
        oslayer.reap_until(child, status_w)
    finally:
        os._exit(255)


def _kill(pid, sig):
    try:
        os.kill(pid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def _killpg(pgid):
    try:
        os.killpg(pgid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass


def _send(sock, msg, fds=()):
    """One message (and descriptors) to the other half; False when it is gone."""
    try:
        if fds:
            sock.sendmsg([msg], [(socket.SOL_SOCKET, socket.SCM_RIGHTS, array.array("i", fds))])
        else:
            sock.send(msg)
        return True
    except OSError:
        return False


def _recv(sock):
    """(message, descriptors) from the other half; (b"", []) when it is gone."""
    try:
        msg, anc, _, _ = sock.recvmsg(1024, socket.CMSG_SPACE(16 * 4))
    except OSError:
        return b"", []
    fds = array.array("i")
    for level, kind, data in anc:
        if level == socket.SOL_SOCKET and kind == socket.SCM_RIGHTS:
            fds.frombytes(data[:len(data) - len(data) % fds.itemsize])
    return msg, list(fds)


class _Pipe:
    """The read end of an output pipe, as ``outcome.collect`` uses a file: ``fileno``, ``close``, ``closed``
    (a file object would cost an ``fstat`` and a buffered reader per pipe, four per job)."""

    __slots__ = ("fd", "closed")

    def __init__(self, fd):
        self.fd, self.closed = fd, False

    def fileno(self):
        return self.fd

    def close(self):
        if not self.closed:
            self.closed = True
            os.close(self.fd)


class _Remote:
    """One of the job's processes as the supervisor sees it: its output pipes and the exit status the
    forker reports (``poll``, ``wait`` and ``returncode`` as ``subprocess.Popen``'s)."""

    def __init__(self, sup, out_r, err_r):
        self.sup, self.returncode = sup, None
        self.stdout, self.stderr = _Pipe(out_r), _Pipe(err_r)

    def poll(self):
        if self.returncode is None:
            self.sup.pump(0)
        return self.returncode

    def wait(self, timeout=None):
        end = None if timeout is None else time.monotonic() + timeout
        while self.returncode is None:
            left = None if end is None else end - time.monotonic()
            if left is not None and left <= 0:
                raise TimeoutError
            self.sup.pump(left)
        return self.returncode


class Supervisor:
    """The half of a worker that reads jobs, feeds them, reads outputs and verdicts and writes results;
    it never forks (module docstring)."""

    def __init__(self, cfg, sock, same_uid):
        self.cfg, self.sock, self.same_uid = cfg, sock, same_uid
        self.buf = bytearray()
        self.seq, self.procs, self.ended, self.status_r = None, {}, None, None

    def _fill(self):
        chunk = os.read(_CTL, 1 << 16)  # not 1 MiB: a buffer that large is an mmap and munmap per read
        if not chunk:
            raise EOFError
        self.buf += chunk

    def header(self):
        while b"\n" not in self.buf:
            if len(self.buf) > 64:
                return ["?"]
            try:
                self._fill()
            except EOFError:
                return None
        i = self.buf.index(b"\n")
        head = bytes(self.buf[:i]).decode("ascii", "replace").split()
        del self.buf[:i + 1]
        return head

    def payload(self, n):
        while len(self.buf) < n:
            try:
                self._fill()
            except EOFError:
                raise OSError("the pool's control pipe closed mid-job") from None
        data = bytes(self.buf[:n])
        del self.buf[:n]
        return data

    def pump(self, timeout):
        """Read the forker's reports for up to ``timeout`` seconds (None: until one comes)."""
        r, _, _ = select.select([self.sock], [], [], timeout)
        while r:
            msg, fds = _recv(self.sock)
            for fd in fds:
                os.close(fd)
            if not msg:  # the forker is gone: so is every process of the job (parent-death signals)
                os._exit(9)
            self._note(msg.split(None, 4))
            r, _, _ = select.select([self.sock], [], [], 0)

    def _note(self, parts):
        if len(parts) >= 4 and parts[0] == b"exit" and int(parts[1]) == self.seq:
            self._exited(parts[2], int(parts[3]))
        elif len(parts) >= 4 and parts[0] == b"ended" and int(parts[1]) == self.seq:
            self._exited(b"j", int(parts[2]))
            self._exited(b"c", int(parts[3]))
            self.ended = ""

    def _exited(self, who, rc):
        """``who`` ended with ``rc``; for the init of a PID namespace the candidate's own wait status
        comes on the status pipe (the init's, if it sent none)."""
        proc = self.procs.get(who)
        if proc is None or proc.returncode is not None:
            return
        if who == b"c" and self.status_r is not None:
            data = b""
            try:
                os.set_blocking(self.status_r, False)
                data = os.read(self.status_r, 4)
            except OSError:
                pass
            os.close(self.status_r)
            self.status_r = None
            if len(data) == 4:
                status = struct.unpack("=i", data)[0]
                rc = -os.WTERMSIG(status) if os.WIFSIGNALED(status) else (
                    os.WEXITSTATUS(status) if os.WIFEXITED(status) else 255)
        proc.returncode = rc

    def reply(self, seq):
        """The forker's answer to ``fork SEQ``: (message parts, descriptors)."""
        while True:
            msg, fds = _recv(self.sock)
            if not msg:
                os._exit(9)
            parts = msg.split(None, 2)
            if parts[0] in (b"forked", b"error", b"bare") and int(parts[1]) == seq:
                return parts, fds
            for fd in fds:
                os.close(fd)

    def supervise(self, seq, nbytes):
        """Run one job; returns the result frame."""
        t0 = time.monotonic()
        cfg = self.cfg
        wall = cfg["wall_time"]
        self.seq, self.procs, self.ended = seq, {}, None
        _send(self.sock, b"fork %d run" % seq)
        try:
            data = self.payload(nbytes)  # while the forker forks
        finally:
            parts, fds = self.reply(seq)
        if parts[0] == b"error":
            return {"status": "crashed", "reason": "runner: could not start the pool's processes: %s"
                    % (parts[2] if len(parts) > 2 else b"").decode("utf-8", "replace")}
        jcfg_w, ver_r, jo_r, je_r, co_r, ce_r, ccfg_w, lay_r = fds[:8]
        self.status_r = fds[8] if len(fds) > 8 else None  # the candidate's wait status, from its init
        pidns_flag, _, dir_list = parts[2].partition(b" ")
        in_pidns = pidns_flag == b"1"
        dirs = [os.fsdecode(d) for d in dir_list.split(b"\0") if d]
        mine = {jcfg_w, ver_r, lay_r, ccfg_w}
        judge = self.procs[b"j"] = _Remote(self, jo_r, je_r)
        cand = self.procs[b"c"] = _Remote(self, co_r, ce_r)

        def close(*xs):
            for fd in xs:
                if fd in mine:
                    mine.discard(fd)
                    os.close(fd)

        def feed(fd, obj):
            try:
                data = json.dumps(obj).encode("utf-8")
                view = memoryview(data)
                while view:
                    view = view[os.write(fd, view):]
            except OSError:
                pass  # the child died before reading: its exit status tells why
            close(fd)

        out = {"c_out": b"", "c_err": b"", "j_out": b"", "j_err": b""}
        verdict, timed_out, over, layers, early = {}, False, None, (), None
        try:
            job = json.loads(data.decode("utf-8"))
            del data
            feed(jcfg_w, {"tests": job["tests"], "frame_cap": cfg["frame_cap"], "same_uid": self.same_uid})
            if self.same_uid and not outcome.await_start(ver_r, t0 + wall):
                early = "runner: could not start the tests' process"
                return
            done = _read_to_eof(lay_r)
            close(lay_r)
            if done.startswith(b"E"):
                early = "runner: the sandbox could not be set up: %s" % done[1:].decode("utf-8", "replace")
                return
            layers = tuple(oslayer.LAYER_NAMES[c] for c in done.decode("ascii", "replace") if c in oslayer.LAYER_NAMES)
            feed(ccfg_w, {"solution": job["solution"], "max_processes": cfg["max_processes"],
                          "frame_cap": cfg["frame_cap"]})
            del job
            out, verdict, timed_out, over = outcome.collect(
                judge, cand, ver_r, deadline=t0 + wall, cap=cfg["max_output_bytes"], frame_cap=cfg["frame_cap"],
                # with a PID namespace the candidate's end already ended everything it started: the
                # forker need not hear (and so keep in its memory) how the candidate ended
                on_candidate_exit=lambda: None if in_pidns else _send(self.sock, b"killcand %d" % seq))
            if verdict and not over:  # as the runner: a short wait saves a kill sweep; a pass waits for the end
                now = time.monotonic()
                if verdict.get("status") == "pass":
                    end = max(t0 + wall, now + 0.5)
                else:
                    end = min(now + (0.5 if verdict.get("status") == "gone" else 0.1), t0 + wall)
                for proc in (judge, cand):
                    try:
                        proc.wait(timeout=max(0.0, end - time.monotonic()))
                    except TimeoutError:
                        pass
        finally:
            close(*list(mine))
            for p in (judge, cand):
                for f in (p.stdout, p.stderr):
                    if not f.closed:
                        f.close()
            _send(self.sock, b"end %d" % seq)
            while self.ended is None:
                self.pump(None)
            if self.status_r is not None:  # never read (the forker reported no exit): closed all the same
                os.close(self.status_r)
                self.status_r = None
            failed = []
            for d in dirs:  # here, not in the forker: it would read the names left in them
                try:
                    procs.remove_tree(d)
                except Exception as e:  # one candidate's leftovers never end the batch
                    failed.append("%s: %s" % (type(e).__name__, e))
            self.ended = "; ".join(failed)[:300]
        if early:
            return {"status": "crashed", "reason": early}
        status, reason = outcome.classify(verdict, cand.returncode, judge.returncode, timed_out=timed_out, over=over,
                                          wall_time=wall, cpu_time=cfg["cpu_time"], file_size_mb=cfg["file_size_mb"])
        if self.ended:
            status, reason = "crashed", "clean-up failed: %s" % self.ended + (
                " (verdict was %s)" % status if status != "crashed" else "")
        return {"status": status, "reason": reason, "returncode": cand.returncode,
                "stdout": (out["c_out"] + out["j_out"]).decode("utf-8", "replace"),
                "stderr": (out["c_err"] + out["j_err"]).decode("utf-8", "replace"),
                "wall_s": time.monotonic() - t0, "os_layers": list(layers)}

    def bare(self, seq):
        _send(self.sock, b"fork %d bare" % seq)
        parts, fds = self.reply(seq)
        for fd in fds:
            os.close(fd)
        if parts[0] != b"bare":
            return {"status": "crashed", "reason": "runner: could not start the floor's process"}
        return {"layers": (parts[2] if len(parts) > 2 else b"").decode("utf-8", "replace")}

    def loop(self):
        while True:
            head = self.header()
            if head is None or head[:1] == ["quit"]:
                os._exit(0)
            if len(head) == 3 and head[0] == "run" and head[1].isdigit() and head[2].isdigit():
                seq, mode = int(head[1]), "run"
            elif len(head) == 2 and head[0] == "bare" and head[1].isdigit():
                seq, mode = int(head[1]), "bare"
            else:
                wire.wire_send(_RES, {"job": None, "fatal": "bad job header %r" % " ".join(head)[:60]})
                os._exit(3)
            try:
                res = self.supervise(seq, int(head[2])) if mode == "run" else self.bare(seq)
            except Exception as e:
                res = {"status": "crashed", "reason": "runner: %s: %s" % (type(e).__name__, str(e)[:200])}
                traceback.print_exc()
            res["job"] = seq
            wire.wire_send(_RES, res)


def _read_to_eof(fd):
    """Everything a pipe's writer sends until it closes its end."""
    parts = []
    while True:
        chunk = os.read(fd, 4096)
        if not chunk:
            return b"".join(parts)
        parts.append(chunk)


def _ended(status):
    if os.WIFSIGNALED(status):
        sig = os.WTERMSIG(status)
        try:
            return "killed by " + signal.Signals(sig).name
        except ValueError:
            return "killed by signal %d" % sig
    return "exit status %d" % (os.WEXITSTATUS(status) if os.WIFEXITED(status) else -1)


def _main():
    libc = ctypes.CDLL(None)
    libc.prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    cfg = wire.wire_recv(_CTL, 1 << 20)
    w = Worker(cfg)
    layers = w.probe()
    ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
    gc.collect()
    gc.freeze()  # forked children do not copy the pages of objects they never free
    try:
        libc.malloc_trim(0)  # free heap pages back to the kernel: fewer page-table entries to copy per fork
    except AttributeError:
        pass
    sup = os.fork()
    if sup == 0:
        try:
            ours.close()
            libc.prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
            libc.prctl(PR_SET_DUMPABLE, 0, 0, 0, 0)  # no ptrace, no /proc/PID/mem for processes of its uid
            libc.prctl(15, b"bonft-supervise", 0, 0, 0)  # PR_SET_NAME
            Supervisor(cfg, theirs, w.cuid is None).loop()
        finally:
            os._exit(70)
    theirs.close()
    os.close(_CTL)  # the forker reads no job
    wire.wire_send(_RES, {"ready": True, "pid": os.getpid(), "layers": layers, "pidns": w.pidns,
                          "mountns": w.mountns})
    seq = None
    while True:
        msg, fds = _recv(ours)
        for fd in fds:
            os.close(fd)
        parts = msg.split()
        alive = bool(parts)
        if len(parts) == 3 and parts[0] == b"fork" and parts[1].isdigit():
            seq = int(parts[1])
            if parts[2] == b"run":
                alive = w.run_job(seq, ours)
            else:
                try:
                    done = w.bare(seq).encode("utf-8", "replace")
                except OSError as e:
                    done = b"E" + str(e).encode("utf-8", "replace")
                alive = _send(ours, b"bare %d %s" % (seq, done))
            if alive:
                seq = None
        if not alive:  # the supervisor died: say so for its job, then let the pool start a fresh worker
            _, status = os.waitpid(sup, 0)
            wire.wire_send(_RES, {"job": seq, "status": "crashed", "worker_exits": True,
                                  "reason": "runner: the pool worker's supervisor of this candidate ended (%s)"
                                  % _ended(status)})
            os._exit(4)


if __name__ == "__main__":
    _main()
