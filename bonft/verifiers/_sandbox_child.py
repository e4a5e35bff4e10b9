"""Bootstrap run inside each sandboxed candidate process (``python -c <this file's text>``).

Not imported by the library: :mod:`bonft.verifiers.sandbox` reads this file and
passes its text to a fresh interpreter, which by then already has the OS
limits (rlimits, unprivileged uid) applied. This code adds the Python-level
layer before any candidate code runs:

* an audit hook (PEP 578) that refuses writes outside the working directory,
  network use, signals to processes other than our own descendants, and
  process creation beyond the budget (forked children get no budget);
* compiles and runs the solution, then the tests, in one fresh namespace;
* reports one JSON record, tagged with a nonce from the parent, on a private
  pipe: ``{"nonce", "status", "reason"}``.

It must stay compatible with Python 3.8+ (the sandbox may use the system
interpreter) and import only the standard library. Audit hooks are not a
security boundary: ctypes, or a program started within the process budget,
gets round them. The OS limits are the stronger layer.
"""
import errno
import json
import os
import sys
import traceback

_WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_APPEND
_SPAWN = {"os.fork", "os.forkpty", "os.posix_spawn", "os.spawn", "os.exec", "os.system", "subprocess.Popen"}
_NET = {"socket.connect", "socket.bind", "socket.sendto", "socket.sendmsg", "socket.getaddrinfo"}
_PATH_ARGS = {  # event -> indices of path arguments that get written
    "os.remove": (0,), "os.rmdir": (0,), "os.mkdir": (0,), "os.rename": (0, 1), "os.link": (1,),
    "os.symlink": (1,), "os.chmod": (0,), "os.chown": (0,), "os.truncate": (0,), "os.utime": (0,),
    "shutil.rmtree": (0,), "shutil.copyfile": (1,), "shutil.copytree": (1,), "shutil.move": (1,),
    "os.chflags": (0,), "os.mkfifo": (0,), "os.mknod": (0,),
}


def _main(cfg_fd, res_fd):
    with os.fdopen(cfg_fd, "rb") as f:
        cfg = json.loads(f.read().decode("utf-8"))
    if sys.path and sys.path[0] in ("", os.getcwd()):
        del sys.path[0]  # the working directory is not an import location
    root = os.path.realpath(os.getcwd())
    top, parent = os.getpid(), os.getppid()
    nonce = cfg.pop("nonce")
    st = {"spawn_left": int(cfg["max_processes"]) - 1, "spawned": False, "refused": None, "limit": None, "busy": False}

    def inside(path):
        if isinstance(path, int):
            return True  # an already-open descriptor
        p = os.path.realpath(os.fsdecode(path))
        return p == root or p.startswith(root + os.sep) or p == os.devnull

    def descendant(pid):
        if pid in (top, os.getpid()):
            return True
        for _ in range(64):
            try:
                with open("/proc/%d/stat" % pid) as f:
                    pid = int(f.read().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                return False
            if pid == top:
                return True
            if pid <= 1:
                return False
        return False

    def refuse(kind, what):
        if st[kind] is None:
            st[kind] = what
        raise PermissionError(errno.EPERM, "bonft sandbox: %s" % what)

    def hook(event, args):
        if st["busy"]:
            return  # events raised by the checks below
        st["busy"] = True
        try:
            if event == "open":
                path, flags = args[0], args[2]
                if isinstance(flags, int) and flags & _WRITE_FLAGS and not inside(path):
                    refuse("refused", "write outside the working directory refused (%s)" % os.fsdecode(path))
            elif event in _PATH_ARGS:
                for i in _PATH_ARGS[event]:
                    if i < len(args) and args[i] is not None and not inside(args[i]):
                        refuse("refused", "%s outside the working directory refused (%s)" % (event, os.fsdecode(args[i])))
            elif event in _SPAWN:
                st["spawned"] = True
                if st["spawn_left"] <= 0:
                    refuse("limit", "process limit (max_processes=%d): %s refused" % (cfg["max_processes"], event))
                st["spawn_left"] -= 1
            elif event in _NET:
                refuse("refused", "network use refused (%s)" % event)
            elif event in ("os.kill", "os.killpg"):
                pid = args[0]
                if event == "os.killpg" and pid != os.getpgid(0):
                    refuse("refused", "signal to another process group refused")
                if event == "os.kill" and (pid == -1 or pid == parent or (pid > 0 and not descendant(pid))):
                    refuse("refused", "signal to a process outside the sandbox refused (pid %d)" % pid)
        finally:
            st["busy"] = False

    def after_fork():
        st["spawn_left"] = 0  # forked children may not create processes

    os.register_at_fork(after_in_child=after_fork)
    sys.addaudithook(hook)

    def finish(status, reason):
        if os.getpid() != top:
            os._exit(0)  # a forked child reached the end: only the top process reports
        if st["limit"] is not None:
            status, reason = "limit-exceeded", st["limit"]
        elif st["refused"] is not None:
            status, reason = "refused", st["refused"]
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except Exception:
                pass
        os.write(res_fd, (json.dumps({"nonce": nonce, "status": status, "reason": reason}) + "\n").encode())
        os._exit(0)

    g = {"__name__": "__main__", "__builtins__": __builtins__}
    phase = "solution"
    try:
        code = compile(cfg.pop("solution"), "solution.py", "exec")
        tests = compile(cfg.pop("tests"), "tests.py", "exec")
        exec(code, g)
        phase = "tests"
        exec(tests, g)
    except SystemExit as e:
        c = e.code
        g.clear()
        finish("fail", "exit code %s during the %s (before the tests finished)" % (0 if c is None else c, phase))
    except AssertionError as e:
        g.clear()
        traceback.print_exc(limit=-3)
        msg = str(e).strip().splitlines()[0][:200] if str(e).strip() else ""
        finish("fail", "AssertionError" + (": " + msg if msg else "") + ("" if phase == "tests" else " in the solution"))
    except MemoryError:
        g.clear()
        finish("limit-exceeded", "MemoryError (memory limit)")
    except BaseException as e:
        g.clear()
        try:
            traceback.print_exc(limit=-3)
        except Exception:
            pass
        name = type(e).__name__
        msg = str(e).strip().splitlines()[0][:200] if str(e).strip() else ""
        where = " in the %s" % phase
        if isinstance(e, OSError) and e.errno == errno.EFBIG:
            finish("limit-exceeded", "file size limit (%s)" % msg)
        if isinstance(e, BlockingIOError) and st["spawned"]:
            finish("limit-exceeded", "process limit (%s: %s)" % (name, msg))
        finish("crashed", name + (": " + msg if msg else "") + where)
    else:
        finish("pass", None)


if __name__ == "__main__":
    _main(int(sys.argv[1]), int(sys.argv[2]))
