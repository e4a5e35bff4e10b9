"""Bootstrap of the trusted test process (``python -c <wire.py + this file>``).

Not imported by the library. :mod:`bonft.verifiers.sandbox.runner` starts this
process under a uid of its own when running as root; otherwise the process
makes itself non-dumpable (PR_SET_DUMPABLE 0: no ptrace, no /proc/PID/mem for
processes without CAP_SYS_PTRACE) before the runner starts the candidate's, so
the candidate cannot reach into it. It runs the tests (user code, trusted) and decides the verdict:

* the tests' names resolve to: the tests' own names, then builtins, then the
  solution's globals, fetched over the pipe. A name of the solution arrives as
  a plain value rebuilt here (:func:`wire_decode`) or as a :class:`Remote`
  reference whose calls, attributes, items and arithmetic are forwarded;
  comparisons and truth tests are never forwarded, so the candidate's
  ``__eq__`` takes no part in an ``assert``;
* an exit, a crash, a protocol error or garbage from the candidate is sticky:
  once seen the verdict cannot be ``pass``, even if the tests catch the error;
* the verdict goes on a pipe only this process and the runner hold.
"""
import builtins
import os
import sys
import traceback

try:
    wire_send  # noqa: B018 - defined by the wire.py text prepended to this one
except NameError:  # pragma: no cover - imported directly for inspection
    from bonft.verifiers.sandbox.wire import WireClosed, WireError, wire_decode, wire_encode, wire_recv, wire_send

_NONPASS = ("fail", "crashed", "limit-exceeded", "refused")
_MISSING = object()
_BUILTINS = vars(builtins)


class _Fatal(BaseException):
    """The candidate's process can no longer be trusted to answer (exit, crash, garbage)."""


class SolutionError(Exception):
    """An exception of the solution's own class, raised during a call (its type name and message)."""


def _plain_only(what):
    return TypeError("%s: the tests compare plain values only (None, bool, int, float, complex, str, "
                     "bytes, list, tuple, dict, set, Fraction, Decimal); convert it inside the solution" % what)


class _Conn:
    def __init__(self, req_fd, resp_fd, cap):
        self.req, self.resp, self.cap = req_fd, resp_fd, cap
        self.seq, self.fatal, self.proxies = 0, None, {}

    def die(self, status, reason):
        if self.fatal is None:
            self.fatal = (status, reason)
        raise _Fatal(reason)

    def recv(self):
        try:
            return wire_recv(self.resp, self.cap)
        except WireClosed:
            self.die("gone", None)
        except (WireError, OSError) as e:
            self.die("crashed", "the solution's process broke the call protocol (%s)" % e)

    def handle(self, ref, typename):
        if ref not in self.proxies:
            r = object.__new__(Remote)
            object.__setattr__(r, "_bonft_ref", ref)
            object.__setattr__(r, "_bonft_type", typename)
            self.proxies[ref] = r
        return self.proxies[ref]

    def ref_of(self, obj):
        if type(obj) is Remote:
            return ["h", obj._bonft_ref, obj._bonft_type]
        raise TypeError("tests can pass only plain values and the solution's own objects into the solution, "
                        "got %s" % type(obj).__name__)

    def decode(self, node):
        try:
            return wire_decode(node, self.handle)
        except WireError as e:
            self.die("crashed", "the solution's process sent a value outside the protocol (%s)" % e)

    def ask(self, op, args=(), kwargs=None, **fields):
        if self.fatal is not None:
            raise _Fatal(self.fatal[1])
        self.seq += 1
        msg = dict(fields, id=self.seq, op=op, args=[wire_encode(a, self.ref_of) for a in args])
        if kwargs:
            msg["kwargs"] = [[k, wire_encode(v, self.ref_of)] for k, v in kwargs.items()]
        try:
            wire_send(self.req, msg)
        except OSError:
            self.die("gone", None)
        rep = self.recv()
        if rep.get("id") != self.seq:
            self.die("crashed", "the solution's process answered out of turn")
        out = rep.get("out")
        if type(out) is str and sys.stdout is not sys.__stdout__:
            sys.stdout.write(out)  # the tests redirected stdout: they see what the solution printed
        if "fatal" in rep:
            status, reason = rep.get("fatal"), rep.get("reason")
            self.die(status if status in ("fail", "limit-exceeded") else "crashed",
                     reason[:300] if type(reason) is str else "the solution's process gave up")
        if "raise" in rep:
            raise self.rebuild(rep)
        if rep.get("missing") is True and op == "get":
            return _MISSING
        if "value" not in rep:
            self.die("crashed", "the solution's process sent a reply without a value")
        value = self.decode(rep["value"])
        if op == "call":
            self.write_back(args, rep.get("back"), kwargs or {}, rep.get("kwback"))
        return value

    def rebuild(self, rep):
        name, message = rep.get("raise"), rep.get("message")
        name = name[:80] if type(name) is str else "Exception"
        message = message[:300] if type(message) is str else ""
        cls = _BUILTINS.get(name)
        if rep.get("builtin") is True and isinstance(cls, type) and issubclass(cls, Exception):
            try:
                return cls(message)
            except Exception:
                pass
        return SolutionError("%s: %s" % (name, message) if message else name)

    def write_back(self, args, back, kwargs, kwback):
        """Mutable arguments the solution changed in place: copy its new contents into the tests' objects."""
        pairs = []
        if type(back) is list:
            pairs += [(args[p[0]], p[1]) for p in back if type(p) is list and len(p) == 2
                      and type(p[0]) is int and 0 <= p[0] < len(args)]
        if type(kwback) is list:
            pairs += [(kwargs[p[0]], p[1]) for p in kwback if type(p) is list and len(p) == 2
                      and type(p[0]) is str and p[0] in kwargs]
        for orig, node in pairs:
            new = self.decode(node)
            if type(new) is not type(orig):
                continue
            if isinstance(orig, (dict, set)):
                orig.clear()
                orig.update(new)
            else:
                orig[:] = new


_conn = None


def _apply(name, *args):
    return _conn.ask("apply", args=args, name=name)


class Remote:
    """An object that stays in the solution's process. Calls, attributes, items, iteration and
    arithmetic are forwarded; ``==`` is identity and truth tests raise, so its ``__eq__`` and
    ``__bool__`` never decide an assertion."""

    __slots__ = ("_bonft_ref", "_bonft_type", "__weakref__")

    def __getattr__(self, name):
        if name.startswith("__") and name.endswith("__"):
            raise AttributeError(name)
        return _conn.ask("attr", args=(self,), name=name)

    def __setattr__(self, name, value):
        _conn.ask("setattr", args=(self, value), name=name)

    def __call__(self, *args, **kwargs):
        return _conn.ask("call", args=args, kwargs=kwargs, ref=self._bonft_ref)

    def __repr__(self):
        try:
            r = _apply("repr", self)
        except Exception:
            r = None
        return r if type(r) is str else "<the solution's %s object>" % self._bonft_type

    def __str__(self):
        return _apply("str", self)

    def __bool__(self):
        raise _plain_only("truth value of the solution's %s object" % self._bonft_type)

    def __len__(self):
        return _apply("len", self)

    def __iter__(self):
        return _apply("iter", self)

    def __next__(self):
        return _apply("next", self)

    def __getitem__(self, key):
        return _apply("getitem", self, key)

    def __setitem__(self, key, value):
        _apply("setitem", self, key, value)

    def __delitem__(self, key):
        _apply("delitem", self, key)

    def __contains__(self, item):
        return _apply("contains", self, item) is True

    def __int__(self):
        return _apply("int", self)

    def __float__(self):
        return _apply("float", self)

    def __index__(self):
        return _apply("index", self)

    def __neg__(self):
        return _apply("neg", self)

    def __pos__(self):
        return _apply("pos", self)

    def __abs__(self):
        return _apply("abs", self)

    def __invert__(self):
        return _apply("invert", self)


def _binary(op):
    def fwd(self, other):
        return _apply(op, self, other)

    def rev(self, other):
        return _apply(op, other, self)

    return fwd, rev


for _op in ("add", "sub", "mul", "truediv", "floordiv", "mod", "pow", "matmul", "lshift", "rshift",
            "and_", "or_", "xor"):
    _d = _op.rstrip("_")
    _f, _r = _binary(_op)
    setattr(Remote, "__%s__" % _d, _f)
    setattr(Remote, "__r%s__" % _d, _r)


class _Names(dict):
    """The tests' globals: their own names, then builtins, then the solution's (over the pipe)."""

    def __missing__(self, name):
        if name in _BUILTINS:
            return _BUILTINS[name]
        value = _conn.ask("get", name=name)
        if value is _MISSING:
            raise KeyError(name)
        return value


def _msg(e):
    s = str(e).strip()
    return s.splitlines()[0][:200] if s else ""


def _run_tests(tests):
    g = _Names(__name__="__main__", __builtins__=_BUILTINS)
    try:
        exec(compile(tests, "tests.py", "exec"), g)
    except _Fatal:
        pass
    except AssertionError as e:
        traceback.print_exc(limit=-3)
        msg = _msg(e)
        return "fail", "AssertionError" + (": " + msg if msg else "")
    except SystemExit as e:
        return "fail", "exit code %s during the tests (before the tests finished)" % (0 if e.code is None else e.code)
    except MemoryError:
        return "limit-exceeded", "MemoryError (memory limit) in the tests"
    except BaseException as e:
        try:
            traceback.print_exc(limit=-3)
        except Exception:
            pass
        msg = _msg(e)
        return "crashed", type(e).__name__ + (": " + msg if msg else "") + " in the tests"
    finally:
        g.clear()
    return "pass", None


def _verdict():
    first = _conn.recv()
    if first.get("ready") is False:
        status, reason = first.get("status"), first.get("reason")
        if status in _NONPASS and type(reason) is str:
            return status, reason[:300]
        return "crashed", "the solution's process sent a malformed report"
    if first.get("ready") is not True:
        return "crashed", "the solution's process broke the call protocol (no ready message)"
    status, reason = _run_tests(_conn.tests)
    if _conn.fatal is not None:
        return _conn.fatal  # sticky: caught or not, the solution's process failed during the tests
    _conn.seq += 1
    try:
        wire_send(_conn.req, {"id": _conn.seq, "op": "finish"})
    except OSError:
        _conn.die("gone", None)
    end = _conn.recv()
    limit, refused = end.get("limit"), end.get("refused")
    if type(limit) is str:
        return "limit-exceeded", limit[:300]
    if type(refused) is str:
        return "refused", refused[:300]
    if end.get("id") != _conn.seq:
        return "crashed", "the solution's process broke the call protocol at the end"
    return status, reason


def _main(cfg_fd, verdict_fd, req_fd, resp_fd):
    import json

    global _conn
    with os.fdopen(cfg_fd, "rb") as f:
        cfg = json.loads(f.read().decode("utf-8"))
    if cfg.get("same_uid"):  # the candidate runs as our uid: shut it out, then let the runner start it
        try:  # PR_SET_DUMPABLE = 4: no ptrace or /proc/PID/mem without CAP_SYS_PTRACE
            import ctypes

            ctypes.CDLL(None).prctl(4, 0, 0, 0, 0)
        except Exception:
            pass
        wire_send(verdict_fd, {"started": True})
    _conn = _Conn(req_fd, resp_fd, int(cfg["frame_cap"]))
    _conn.tests = cfg["tests"]
    try:
        status, reason = _verdict()
    except _Fatal:
        status, reason = _conn.fatal
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except Exception:
            pass
    wire_send(verdict_fd, {"status": status, "reason": reason})
    os._exit(0)


if __name__ == "__main__":
    _main(int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]))
