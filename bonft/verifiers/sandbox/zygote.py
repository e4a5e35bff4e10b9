"""Bootstrap of a sandbox pool worker (``python -c <this file> SANDBOX_DIR CTL_FD RESULT_FD``).

Not imported by the library: :class:`~bonft.verifiers.sandbox.pool.SandboxPool` starts
one such process per worker, as root when the caller is, with a scrubbed
environment. It loads the sandbox's own modules (``wire``, ``oslayer``,
``outcome``, ``procs``) from SANDBOX_DIR, compiles the two bootstraps
(``wire.py`` + ``candidate.py``, ``wire.py`` + ``judge.py``) once, prepares
the seccomp program, and then only forks. It never reads a candidate's
solution or tests: it reads a short header per job from its control pipe
(``run SEQ NBYTES``), forks a supervisor for the job and waits for it. The
supervisor

1. forks the tests' process (its own session, uid, limits, ``no_new_privs``)
   and the candidate's: as root it unshares a PID namespace whose init starts
   the candidate's process (PID 2), which applies the same layers as a
   one-at-a-time run (:func:`~bonft.verifiers.sandbox.oslayer.apply_layers`:
   limits, private /tmp, /var/tmp, /dev/shm, /run/lock, its own /proc, IPC and
   network namespaces, its own uid, ``no_new_privs``, the user-namespace
   filter) in a fresh working directory and closes every descriptor but its
   own three pipes and its output;
2. only then reads the job (NBYTES of JSON) from the control pipe, so neither
   child holds a byte of it in memory: the candidate's process gets its
   solution on a pipe, the tests' process its tests on another, as in a
   one-at-a-time run;
3. reads both processes' output and the verdict, kills and reaps what is
   left, removes the two directories, and writes the result frame to the
   result pipe (``outcome.classify``: the same rules as the runner).

A supervisor that dies without a result (or a job the worker cannot read)
gets a ``crashed`` frame naming the cause, and the worker then exits so that
the pool starts a fresh one. A header ``bare SEQ`` runs the floor: the
candidate's process with the same layers and working directory, doing nothing.
"""
import builtins
import gc
import os
import signal
import struct
import sys
import time
import traceback
import types

_HERE = sys.argv[1]
_CTL, _RES = int(sys.argv[2]), int(sys.argv[3])
PR_SET_DUMPABLE = 4


def _load(name):
    """The sandbox module ``name`` from its file, without the package (whose imports a worker does not
    need: every module loaded here is copied into every fork)."""
    path = os.path.join(_HERE, name + ".py")
    mod = types.ModuleType("bonft_sandbox_" + name)
    mod.__file__ = path
    sys.modules[mod.__name__] = mod
    with open(path, encoding="utf-8") as f:
        exec(compile(f.read(), path, "exec"), mod.__dict__)
    return mod


wire, oslayer, outcome, procs = _load("wire"), _load("oslayer"), _load("outcome"), _load("procs")
import ctypes  # noqa: E402 - after the sandbox modules, which import it too
import json  # noqa: E402

for _name in ("base64", "collections", "errno", "io", "math", "selectors"):
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


def _boot_code(name):
    with open(os.path.join(_HERE, "wire.py"), encoding="utf-8") as f:
        text = f.read()
    with open(os.path.join(_HERE, name), encoding="utf-8") as f:
        text += "\n" + f.read()
    prelude = "import sys\nif sys.path and sys.path[0] in ('', '.'):\n    del sys.path[0]\n"
    return compile(prelude + text, "<string>", "exec")


class _Child:
    """A forked child, read like the runner's ``subprocess.Popen``: ``poll``, ``wait``, ``returncode``
    (minus the signal number when killed), ``stdout``/``stderr`` (its output pipes). For the init of a
    PID namespace the candidate's own wait status comes on ``status_r`` (the init's otherwise)."""

    def __init__(self, pid, out_r, err_r, status_r=None):
        self.pid, self.returncode, self._status_r = pid, None, status_r
        self.stdout, self.stderr = os.fdopen(out_r, "rb", buffering=0), os.fdopen(err_r, "rb", buffering=0)
        try:
            self._pidfd = os.pidfd_open(pid)
        except (AttributeError, OSError):
            self._pidfd = None

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
        if self._pidfd is not None:
            os.close(self._pidfd)
            self._pidfd = None

    def poll(self):
        if self.returncode is None:
            try:
                pid, status = os.waitpid(self.pid, os.WNOHANG)
            except ChildProcessError:
                pid, status = self.pid, 255 << 8
            if pid == self.pid:
                self._done(status)
        return self.returncode

    def wait(self, timeout=None):
        end = None if timeout is None else time.monotonic() + timeout
        while self.poll() is None:
            left = None if end is None else end - time.monotonic()
            if left is not None and left <= 0:
                raise TimeoutError
            if self._pidfd is not None:
                import select

                select.select([self._pidfd], [], [], left)
            else:
                time.sleep(min(0.002, left) if left is not None else 0.002)
        return self.returncode


class Worker:
    def __init__(self, cfg):
        self.cfg = cfg
        self.root = bool(cfg["root"])
        self.cuid, self.juid = cfg["cuid"], cfg["juid"]
        self.libc = ctypes.CDLL(None, use_errno=True)
        self.mountns, self.pidns = bool(cfg["mountns"]), bool(cfg["pidns"])
        self.limits = [(int(r), (int(s), int(h))) for r, s, h in cfg["limits"]]
        self.cand_code, self.judge_code = _boot_code("candidate.py"), _boot_code("judge.py")
        self.tmp = cfg["tmp"]
        self.pid = os.getpid()  # the worker's: its directories carry it, so the pool can sweep them if it dies
        self._plan()

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

    def _run_boot(self, code, fds, workdir):
        os.environ.clear()
        os.environ.update(oslayer.env(workdir))
        if "tempfile" in sys.modules:
            sys.modules["tempfile"].tempdir = None  # read from TMPDIR again, as a fresh interpreter would
        main = types.ModuleType("__main__")
        main.__dict__["__builtins__"] = builtins
        sys.modules["__main__"] = main
        sys.argv = ["-c"] + [str(fd) for fd in fds]
        status = 0
        try:
            exec(code, main.__dict__)
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
            self._run_boot(self.judge_code, keep, judgedir)
        finally:
            os._exit(127)

    def fork_candidate(self, workdir, keep, out_w, err_w, report_w, bare=False):
        """(pid to wait for, status pipe or None): as root the init of a fresh PID namespace. ``bare``
        (the floor): the process with every layer exits at once, and it is the namespace's PID 1 itself
        (no init forks it: the fewest processes these layers take)."""
        pid_layer = self.pidns and bool(self.dirs) and self.libc.unshare(oslayer.CLONE_NEWPID) == 0
        status_r = status_w = None
        if pid_layer and not bare:
            status_r, status_w = os.pipe()
        pid = os.fork()
        if pid:
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
                    oslayer._ns_init(child, status_w)
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
            self._run_boot(self.cand_code, keep, workdir)
        finally:
            os._exit(127)

    # -- one job -----------------------------------------------------------------------------
    def _mkdirs(self, seq):
        tag = "%d.%d." % (self.pid, seq)
        workdir = _mkdtemp("bonft-sandbox-" + tag, self.tmp)
        judgedir = _mkdtemp("bonft-tests-" + tag, self.tmp)
        if self.root:
            os.chown(workdir, self.cuid, self.cuid)
            os.chown(judgedir, self.juid, self.juid)
        return workdir, judgedir

    def _kill_candidate(self, cand, in_pidns, workdir):
        if in_pidns:  # the namespace's init: its end takes every process of the namespace with it
            try:
                os.kill(cand.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            return
        try:
            os.killpg(cand.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        if self.cuid is not None:
            for _ in range(50):
                if not procs.pids_of(self.cuid):
                    break
                procs.kill_uid(self.cuid)
                time.sleep(0.01)
        else:
            procs.kill_by_cwd(workdir)

    def supervise(self, seq, nbytes):
        """Run one job (module docstring); returns the result frame."""
        t0 = time.monotonic()
        cfg = self.cfg
        wall = cfg["wall_time"]
        left = [nbytes]

        def read_job():
            parts = []
            while left[0]:
                chunk = os.read(_CTL, min(left[0], 1 << 20))
                if not chunk:
                    raise OSError("the pool's control pipe closed mid-job")
                parts.append(chunk)
                left[0] -= len(chunk)
            return json.loads(b"".join(parts).decode("utf-8"))

        workdir = judgedir = None
        fds = set()
        judge = cand = None
        in_pidns, layers = False, ()

        def pipe():
            r, w = os.pipe()
            fds.update((r, w))
            return r, w

        def close(*xs):
            for fd in xs:
                if fd in fds:
                    fds.discard(fd)
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
        verdict, timed_out, over = {}, False, None
        try:
            try:
                workdir, judgedir = self._mkdirs(seq)
                (jcfg_r, jcfg_w), (ver_r, ver_w), (req_r, req_w), (rep_r, rep_w), (ccfg_r, ccfg_w) = [
                    pipe() for _ in range(5)]
                (jo_r, jo_w), (je_r, je_w), (co_r, co_w), (ce_r, ce_w), (lay_r, lay_w) = [pipe() for _ in range(5)]
                jpid = self.fork_judge(judgedir, (jcfg_r, ver_w, req_w, rep_r), jo_w, je_w)
                fds.discard(jo_r)
                fds.discard(je_r)
                judge = _Child(jpid, jo_r, je_r)
                cpid, status_r = self.fork_candidate(workdir, (ccfg_r, req_r, rep_w), co_w, ce_w, lay_w)
                fds.discard(co_r)
                fds.discard(ce_r)
                cand = _Child(cpid, co_r, ce_r, status_r)
                in_pidns = status_r is not None
                close(jcfg_r, ver_w, req_w, rep_r, ccfg_r, rep_w, jo_w, je_w, co_w, ce_w, lay_w)
            except OSError as e:
                read_job()
                return {"status": "crashed", "reason": "runner: could not start the pool's processes: %s" % e}
            job = read_job()  # only now: no child holds a byte of it
            feed(jcfg_w, {"tests": job["tests"], "frame_cap": cfg["frame_cap"], "same_uid": self.cuid is None})
            if self.cuid is None and not outcome.await_start(ver_r, t0 + wall):
                return {"status": "crashed", "reason": "runner: could not start the tests' process"}
            done = _read_to_eof(lay_r)
            close(lay_r)
            if done.startswith(b"E"):
                return {"status": "crashed", "reason": "runner: the sandbox could not be set up: %s"
                        % done[1:].decode("utf-8", "replace")}
            layers = tuple(oslayer.LAYER_NAMES[c] for c in done.decode("ascii", "replace") if c in oslayer.LAYER_NAMES)
            feed(ccfg_w, {"solution": job["solution"], "max_processes": cfg["max_processes"],
                          "frame_cap": cfg["frame_cap"]})
            del job
            out, verdict, timed_out, over = outcome.collect(
                judge, cand, ver_r, deadline=t0 + wall, cap=cfg["max_output_bytes"], frame_cap=cfg["frame_cap"],
                on_candidate_exit=lambda: self._kill_candidate(cand, in_pidns, workdir))
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
            if cand is not None:
                self._kill_candidate(cand, in_pidns, workdir)
            if judge is not None:
                try:
                    os.killpg(judge.pid, signal.SIGKILL)
                except (ProcessLookupError, PermissionError):
                    pass
            rcs = [p.wait() if p is not None else None for p in (judge, cand)]
            for p in (judge, cand):
                if p is not None:
                    for f in (p.stdout, p.stderr):
                        if not f.closed:
                            f.close()
            close(*list(fds))
            failed = []
            for d in (workdir, judgedir):
                if d is not None:
                    try:
                        procs.remove_tree(d)
                    except Exception as e:  # one candidate's leftovers never end the batch
                        failed.append("%s: %s" % (type(e).__name__, e))
            left_behind = "; ".join(failed)[:300] or None
        status, reason = outcome.classify(verdict, rcs[1], rcs[0], timed_out=timed_out, over=over, wall_time=wall,
                                          cpu_time=cfg["cpu_time"], file_size_mb=cfg["file_size_mb"])
        if left_behind:
            status, reason = "crashed", "clean-up failed: %s" % left_behind + (
                " (verdict was %s)" % status if status != "crashed" else "")
        return {"status": status, "reason": reason, "returncode": rcs[1],
                "stdout": (out["c_out"] + out["j_out"]).decode("utf-8", "replace"),
                "stderr": (out["c_err"] + out["j_err"]).decode("utf-8", "replace"),
                "wall_s": time.monotonic() - t0, "os_layers": list(layers)}

    def bare(self, seq):
        """The floor: the candidate's process with the same layers in a fresh working directory, doing
        nothing; returns the layers that took effect (or the set-up error)."""
        workdir, judgedir = self._mkdirs(seq)
        lay_r, lay_w = os.pipe()
        out_r, out_w = os.pipe()
        try:
            pid, status_r = self.fork_candidate(workdir, (), out_w, out_w, lay_w, bare=True)
            os.close(lay_w)
            os.close(out_w)
            done = _read_to_eof(lay_r)
            child = _Child(pid, out_r, os.dup(out_r), status_r)
            child.wait()
            child.stdout.close()
            child.stderr.close()
        finally:
            os.close(lay_r)
            procs.remove_tree(workdir)
            procs.remove_tree(judgedir)
        return done.decode("utf-8", "replace")

    def probe(self):
        """Fall back without the PID namespace, then without the mount namespace, while their set-up
        fails (a container may refuse them even to root); returns the layer letters that took effect."""
        while True:
            r, w = os.pipe()
            pid = os.fork()  # the PID namespace is unshared in a child: the worker's own children stay in its
            if pid == 0:
                try:
                    os.write(w, self.bare(0).encode("utf-8"))
                finally:
                    os._exit(0)
            os.close(w)
            done = _read_to_eof(r)
            os.close(r)
            os.waitpid(pid, 0)
            done = done.decode("utf-8", "replace")
            if not done.startswith("E"):
                return done
            if self.pidns:
                self.pidns = False
            elif self.mountns:
                self.mountns = False
                self._plan()
            else:
                return done


def _read_to_eof(fd):
    """Everything a pipe's writer sends until it closes its end."""
    parts = []
    while True:
        chunk = os.read(fd, 4096)
        if not chunk:
            return b"".join(parts)
        parts.append(chunk)


def _read_header():
    head = b""
    while True:
        c = os.read(_CTL, 1)
        if not c:
            return None
        if c == b"\n":
            return head.decode("ascii", "replace").split()
        head += c
        if len(head) > 64:
            return ["?"]


def _ended(status):
    if os.WIFSIGNALED(status):
        sig = os.WTERMSIG(status)
        try:
            return "killed by " + signal.Signals(sig).name
        except ValueError:
            return "killed by signal %d" % sig
    return "exit status %d" % (os.WEXITSTATUS(status) if os.WIFEXITED(status) else -1)


def _main():
    ctypes.CDLL(None).prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    cfg = wire.wire_recv(_CTL, 1 << 20)
    w = Worker(cfg)
    layers = w.probe()
    gc.collect()
    gc.freeze()  # forked children do not copy the pages of objects they never free
    wire.wire_send(_RES, {"ready": True, "pid": os.getpid(), "layers": layers, "pidns": w.pidns,
                          "mountns": w.mountns})
    while True:
        head = _read_header()
        if head is None or head[:1] == ["quit"]:
            os._exit(0)
        if len(head) == 3 and head[0] == "run" and head[1].isdigit() and head[2].isdigit():
            seq, mode = int(head[1]), "run"
        elif len(head) == 2 and head[0] == "bare" and head[1].isdigit():
            seq, mode = int(head[1]), "bare"
        else:
            wire.wire_send(_RES, {"job": None, "fatal": "bad job header %r" % " ".join(head)[:60]})
            os._exit(3)
        pid = os.fork()
        if pid == 0:
            try:
                w.libc.prctl(oslayer.PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
                try:
                    if mode == "run":
                        res = w.supervise(seq, int(head[2]))
                    else:
                        res = {"layers": w.bare(seq)}
                except Exception as e:
                    res = {"status": "crashed", "reason": "runner: %s: %s" % (type(e).__name__, str(e)[:200])}
                    traceback.print_exc()
                res["job"] = seq
                wire.wire_send(_RES, res)
                os._exit(0)
            finally:
                os._exit(70)
        _, status = os.waitpid(pid, 0)
        if status != 0:  # the supervisor died without its result: say so, then let the pool start a fresh worker
            wire.wire_send(_RES, {"job": seq, "status": "crashed", "worker_exits": True,
                                  "reason": "runner: the pool worker's supervisor of this candidate ended (%s)"
                                  % _ended(status)})
            os._exit(4)


if __name__ == "__main__":
    _main()
