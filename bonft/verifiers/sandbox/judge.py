"""Bootstrap of the trusted test process (``python -c <wire.py + this file>``).

Not imported by the library. :mod:`bonft.verifiers.sandbox.runner` starts this
process under a uid of its own when running as root; otherwise the process
makes itself non-dumpable (PR_SET_DUMPABLE 0: no ptrace, no /proc/PID/mem for
processes without CAP_SYS_PTRACE) before the runner starts the candidate's, so
the candidate cannot reach into it. It runs the tests (user code, trusted) and decides the verdict:

* the tests' names resolve to: the tests' own names, then builtins, then the
  solution's globals, fetched over the pipe. A name of the solution arrives as
  a plain value rebuilt here (:func:`wire_decode`: this process's own
  ``int``, ``str``, ``list``...) or, for a function or class, as a
  :class:`Remote` the tests can call and nothing else. A call's result is
  plain data, rebuilt here, or the verdict fails (``unsupported return
  type: Z``): no method or operator of an object of the solution ever runs
  for the tests, so none can decide an ``assert``;
* an exception raised by the solution's code reaches the tests as
  :class:`SolutionError` (an ``Exception``, never ``StopIteration``,
  ``GeneratorExit``, ``KeyboardInterrupt`` or ``SystemExit``, so it cannot
  end the tests' iterations quietly); an exit is fatal;
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
    from bonft.verifiers.sandbox.wire import (
        WireClosed,
        WireError,
        wire_decode,
        wire_encode,
        wire_read_all,
        wire_recv,
        wire_send,
    )

_NONPASS = ("fail", "crashed", "limit-exceeded", "refused")
_MISSING = object()
_BUILTINS = vars(builtins)


class _Fatal(BaseException):
    """The candidate's process can no longer be trusted to answer (exit, crash, garbage)."""


class SolutionError(Exception):
    """An exception raised by the solution's code during a call: ``type_name`` (its class's name,
    e.g. ``"ValueError"``), ``message``; ``str()`` is ``"ValueError: message"``. The one exception
    type the tests see from the solution, available to them as the name ``SolutionError``."""

    def __init__(self, type_name, message):
        Exception.__init__(self, "%s: %s" % (type_name, message) if message else type_name)
        self.type_name, self.message = type_name, message


def _plain_only(what):
    return TypeError("%s: the tests can only call the solution's functions and classes; their results "
                     "arrive as plain values (None, bool, int, float, complex, str, bytes, bytearray, list, "
                     "tuple, dict, set, frozenset, Fraction, Decimal)" % what)


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

    def decode(self, node, refs=False):
        def no_ref(ref, typename):
            raise WireError("a reference where only plain data may go")

        try:
            if refs and type(node) is list and node[:1] == ["h"]:
                return wire_decode(node, self.handle)
            return wire_decode(node, no_ref)
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
            name, message = rep.get("raise"), rep.get("message")
            raise SolutionError(name[:80] if type(name) is str else "Exception",
                                message[:300] if type(message) is str else "")
        if rep.get("missing") is True and op == "get":
            return _MISSING
        if "value" not in rep:
            self.die("crashed", "the solution's process sent a reply without a value")
        value = self.decode(rep["value"], refs=op == "get")
        if op == "call":
            self.write_back(args, rep.get("back"), kwargs or {}, rep.get("kwback"))
        return value

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


class Remote:
    """A function or class of the solution: the tests can call it (the call runs in the solution's
    process and its result comes back as plain data) and nothing else. ``==`` is identity, and its
    truth value, attributes, items and operators raise ``TypeError``/``AttributeError``."""

    __slots__ = ("_bonft_ref", "_bonft_type", "__weakref__")

    def __getattr__(self, name):
        raise AttributeError("%s: the tests can only call the solution's %s, not read its attributes"
                             % (name, self._bonft_type))

    def __setattr__(self, name, value):
        raise AttributeError("%s: the tests cannot set attributes of the solution's %s" % (name, self._bonft_type))

    def __call__(self, *args, **kwargs):
        return _conn.ask("call", args=args, kwargs=kwargs, ref=self._bonft_ref)

    def __repr__(self):
        return "<the solution's %s>" % self._bonft_type

    def __bool__(self):
        raise _plain_only("truth value of the solution's %s" % self._bonft_type)


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
    g = _Names(__name__="__main__", __builtins__=_BUILTINS, SolutionError=SolutionError)
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
    cfg = json.loads(wire_read_all(cfg_fd).decode("utf-8"))
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
