"""Bootstrap run inside each sandboxed candidate process (``python -c <wire.py + this file>``).

Not imported by the library: :mod:`bonft.verifiers.sandbox.runner` passes the text
of ``wire.py`` followed by this file's text to a fresh interpreter, which by
then already has the OS limits (rlimits, unprivileged uid, private /tmp)
applied. This code

* installs an audit hook (PEP 578) that refuses writes outside the working
  directory, network use, signals to processes other than our own
  descendants, and process creation beyond the budget;
* runs the solution in a fresh namespace, then serves the trusted test
  process: it looks up the solution's names and calls its functions, and
  converts what they return to plain data here (exact built-in types only,
  see ``wire.py``); a function or class looked up by name stays here as a
  reference the tests can only call. Anything else (an instance of the
  solution's class, a subclass of ``int`` or ``str``, a generator) is
  ``unsupported return type: Z``, a failed verdict. An exception of the
  solution travels as its type name and message. It never sees the tests and
  decides no verdict: everything it says is data, checked by the other side.
  Its claims can only turn a verdict into a non-pass (``refused``,
  ``limit-exceeded``, an error).

It must stay compatible with Python 3.8+ and import only the standard
library. Audit hooks are not a security boundary: ctypes, or a program
started within the process budget, gets round them.
"""
import errno
import io
import os
import sys
import traceback

try:
    wire_send  # noqa: B018 - defined by the wire.py text prepended to this one
except NameError:  # pragma: no cover - imported directly for inspection
    from bonft.verifiers.sandbox.wire import (
        WireClosed,
        WireError,
        wire_decode,
        wire_encode,
        wire_read_all,
        wire_recv,
        wire_send,
    )

_WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_APPEND
_SPAWN = {"os.fork", "os.forkpty", "os.posix_spawn", "os.spawn", "os.exec", "os.system", "subprocess.Popen"}
_NET = {"socket.connect", "socket.bind", "socket.sendto", "socket.sendmsg", "socket.getaddrinfo"}
_PATH_ARGS = {  # event -> indices of path arguments that get written
    "os.remove": (0,), "os.rmdir": (0,), "os.mkdir": (0,), "os.rename": (0, 1), "os.link": (1,),
    "os.symlink": (1,), "os.chmod": (0,), "os.chown": (0,), "os.truncate": (0,), "os.utime": (0,),
    "shutil.rmtree": (0,), "shutil.copyfile": (1,), "shutil.copytree": (1,), "shutil.move": (1,),
    "os.chflags": (0,), "os.mkfifo": (0,), "os.mknod": (0,),
}
_MUTABLE = (list, dict, set, bytearray)


def _install_guard(st, root, top, parent):
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
                    refuse("limit", "process limit (max_processes=%d): %s refused" % (st["max_processes"], event))
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


def _msg(e):
    s = str(e).strip()
    return s.splitlines()[0][:200] if s else ""


def _solution_error(e, st):
    """(status, reason) for an exception that ended the solution's own code (never ``pass``)."""
    name, msg = type(e).__name__, _msg(e)
    if isinstance(e, SystemExit):
        c = e.code
        return "fail", "exit code %s during the solution (before the tests finished)" % (0 if c is None else c)
    if isinstance(e, AssertionError):
        return "fail", "AssertionError" + (": " + msg if msg else "") + " in the solution"
    if isinstance(e, MemoryError):
        return "limit-exceeded", "MemoryError (memory limit)"
    if isinstance(e, OSError) and e.errno == errno.EFBIG:
        return "limit-exceeded", "file size limit (%s)" % msg
    if isinstance(e, BlockingIOError) and st["spawned"]:
        return "limit-exceeded", "process limit (%s: %s)" % (name, msg)
    return "crashed", name + (": " + msg if msg else "") + " in the solution"


class _Tee(io.TextIOBase):
    """stdout while the solution is called: to the real stream and to a capped buffer for the tests."""

    def __init__(self, real, cap):
        self.real, self.buf, self.left = real, [], cap

    def write(self, s):
        self.real.write(s)
        if self.left > 0:
            self.buf.append(s[:self.left])
            self.left -= len(s)
        return len(s)

    def flush(self):
        self.real.flush()


class _Unsupported(Exception):
    """A value that is not plain data where only plain data may go."""


def _type_name(obj):
    name = getattr(type(obj), "__name__", None)
    return name[:80] if type(name) is str else "object"


def _serve(g, req_fd, resp_fd, st, cap, top):
    objs, ids = {}, {}

    def ref_of(obj):
        key = id(obj)
        if key not in ids:
            ids[key] = len(objs) + 1
            objs[ids[key]] = obj
        return ["h", ids[key], _type_name(obj)]

    def not_plain(obj):
        raise _Unsupported(_type_name(obj))

    def deref(ref, typename):
        if ref not in objs:
            raise WireError("unknown reference %r" % ref)
        return objs[ref]

    def dec(node):
        return wire_decode(node, deref)

    while True:
        try:
            req = wire_recv(req_fd, cap)
        except WireClosed:
            os._exit(0)
        rid, op = req.get("id"), req.get("op")
        reply = {"id": rid}
        if op == "finish":
            for stream in (sys.stdout, sys.stderr):
                try:
                    stream.flush()
                except Exception:
                    pass
            reply["refused"], reply["limit"] = st["refused"], st["limit"]
            wire_send(resp_fd, reply)
            os._exit(0)
        real_out = sys.stdout
        tee = _Tee(real_out, cap // 4)
        stage = "return"
        try:
            if op == "get":
                stage = "name"
                name = req["name"]
                if type(name) is not str or name not in g:
                    reply["missing"] = True
                    wire_send(resp_fd, reply)
                    continue
                value = g[name]
                try:
                    reply["value"] = wire_encode(value, not_plain)
                except _Unsupported as e:
                    if not callable(value):  # a function or class stays here: the tests can only call it
                        raise _Unsupported("%s (the solution's name %s)" % (e, name[:80])) from None
                    reply["value"] = ref_of(value)
            elif op == "call":
                stage = "argument"
                args = [dec(a) for a in req.get("args", [])]
                kwargs = {k: dec(v) for k, v in req.get("kwargs", [])}
                fn = objs[req["ref"]]
                stage = "call"
                sys.stdout = tee
                try:
                    value = fn(*args, **kwargs)
                finally:
                    sys.stdout = real_out
                stage = "return"
                reply["value"] = wire_encode(value, not_plain)
                stage = "argument written back"
                reply["back"] = [[i, wire_encode(a, not_plain)] for i, a in enumerate(args) if type(a) in _MUTABLE]
                reply["kwback"] = [[k, wire_encode(v, not_plain)] for k, v in kwargs.items() if type(v) in _MUTABLE]
            else:
                raise WireError("unknown request %r" % (op,))
        except _Unsupported as e:
            what = {"return": "return type", "name": "value",
                    "argument written back": "value written into an argument"}
            reply = {"id": rid, "fatal": "fail", "reason": "unsupported %s: %s" % (what.get(stage, stage), e)}
        except (SystemExit, KeyboardInterrupt, GeneratorExit) as e:
            code = getattr(e, "code", None)
            reply = {"id": rid, "fatal": "fail", "reason": "%s%s raised by the solution during the tests" % (
                type(e).__name__, "" if code is None and not isinstance(e, SystemExit) else "(%s)" % (0 if code is None else code))}
        except MemoryError:
            reply = {"id": rid, "fatal": "limit-exceeded", "reason": "MemoryError (memory limit)"}
        except BaseException as e:
            if isinstance(e, OSError) and e.errno == errno.EFBIG:
                reply = {"id": rid, "fatal": "limit-exceeded", "reason": "file size limit (%s)" % _msg(e)}
            elif stage != "call":  # converting the result (a value too large or too deep, a broken type)
                reply = {"id": rid, "fatal": "fail", "reason": "unsupported %s: %s" % (
                    "return value" if stage == "return" else stage, (_type_name(e) + ": " + _msg(e))[:200])}
            else:
                try:
                    message = _msg(e)
                except BaseException:
                    message = ""
                reply = {"id": rid, "raise": _type_name(e), "message": message}
                try:
                    traceback.print_exc(limit=-3)
                except BaseException:
                    pass
        if os.getpid() != top:
            os._exit(0)  # a child forked during the call: only the top process answers
        if tee.buf:
            reply["out"] = "".join(tee.buf)
        wire_send(resp_fd, reply)


def _main(cfg_fd, req_fd, resp_fd):
    import json

    cfg = json.loads(wire_read_all(cfg_fd).decode("utf-8"))
    if sys.path and sys.path[0] in ("", os.getcwd()):
        del sys.path[0]  # the working directory is not an import location
    st = {"spawn_left": int(cfg["max_processes"]) - 1, "max_processes": int(cfg["max_processes"]),
          "spawned": False, "refused": None, "limit": None, "busy": False}
    top = os.getpid()
    _install_guard(st, os.path.realpath(os.getcwd()), top, os.getppid())
    g = {"__name__": "__main__", "__builtins__": __builtins__}
    try:
        exec(compile(cfg.pop("solution"), "solution.py", "exec"), g)
    except BaseException as e:
        if os.getpid() != top:
            os._exit(0)  # a forked child reached the end: only the top process reports
        if not isinstance(e, SystemExit):
            try:
                traceback.print_exc(limit=-3)
            except Exception:
                pass
        status, reason = _solution_error(e, st)
        if st["limit"] is not None:
            status, reason = "limit-exceeded", st["limit"]
        elif st["refused"] is not None:
            status, reason = "refused", st["refused"]
        wire_send(resp_fd, {"ready": False, "status": status, "reason": reason})
        os._exit(0)
    if os.getpid() != top:
        os._exit(0)
    wire_send(resp_fd, {"ready": True})
    _serve(g, req_fd, resp_fd, st, int(cfg["frame_cap"]), top)


if __name__ == "__main__":
    _main(int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]))
