"""The pipe protocol between the sandboxed solution and the trusted test process.

Shared source: :mod:`bonft.verifiers.sandbox.runner` prepends this file's text to the
two bootstraps (``candidate.py``, ``judge.py``), which run under a
possibly different interpreter (Python 3.8+, standard library only), and the
library imports it for its own checks. No pickle anywhere: only the values
below cross the boundary, and :func:`wire_decode` rebuilds them as the trusted
process's own built-in objects, so nothing of the candidate's (a class, an
``__eq__``, a subclass) survives the trip.

Frame: ASCII decimal length, ``\\n``, then that many bytes of UTF-8 JSON.
A frame longer than the reader's cap, a bad header or bad JSON is a
:class:`WireError`; end of file is :class:`WireClosed`.

Values, each a JSON list ``[tag, ...]``::

    ["N"] None               ["b", true] bool          ["i", "-0x1f"] int (hex: no digit limit)
    ["f", "0x1.8p+1"] float (float.hex; "nan", "inf")  ["c", re, im] complex (float.hex each)
    ["s", "text"] str        ["y", "base64"] bytes     ["Y", "base64"] bytearray
    ["l", [v...]] list       ["t", [v...]] tuple       ["S", [v...]] set   ["F", [v...]] frozenset
    ["d", [[k, v]...]] dict  ["q", num, den] Fraction (hex ints)         ["D", "1.5"] Decimal
    ["h", ref, "typename"] a reference to an object that stays in the solution's process

Only these exact types are plain data; a subclass of one of them (``class
Z(int)``, a ``str`` subclass) is not, and goes to ``ref_of`` like any other
object. Three standard-library subclasses of ``dict`` travel as a ``dict``
(``collections.Counter``, ``OrderedDict``, ``defaultdict``: the encoder reads
their items with ``dict.items``, no method of theirs runs), and numpy's own
scalar types as their Python value (``numpy.int64(5)`` as ``5``).
"""
import base64
import json

WIRE_MAX_DEPTH = 64
WIRE_MAX_NODES = 200000


class WireError(Exception):
    """A frame or value that breaks the protocol."""


class WireClosed(WireError):
    """The other end closed its pipe (or its process is gone)."""


def _no_constants(name):
    raise WireError("JSON constant %s" % name)


# made once: json.dumps and json.loads with options build a new encoder or decoder on every call
_ENCODER = json.JSONEncoder(separators=(",", ":"), allow_nan=False)
_DECODER = json.JSONDecoder(parse_constant=_no_constants)


def wire_send(fd, message):
    """Write one frame holding ``message`` (a dict of plain JSON) to ``fd``."""
    import os

    data = _ENCODER.encode(message).encode("utf-8")
    data = b"%d\n" % len(data) + data
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


def wire_read_all(fd):
    """Everything written to the pipe ``fd`` until its writer closes it; closes ``fd`` (plain reads: a
    file object would build a buffered reader, pages a forked child must copy)."""
    import os

    parts = []
    try:
        while True:
            chunk = os.read(fd, 1 << 16)
            if not chunk:
                return b"".join(parts)
            parts.append(chunk)
    finally:
        os.close(fd)


def _read_exact(fd, n):
    import os

    parts, left = [], n
    while left:
        chunk = os.read(fd, min(left, 1 << 20))
        if not chunk:
            raise WireClosed("pipe closed")
        parts.append(chunk)
        left -= len(chunk)
    return b"".join(parts)


def wire_recv(fd, cap):
    """Read one frame from ``fd``: its JSON object (a dict). At most ``cap`` bytes of payload."""
    import os

    head = b""
    while True:
        c = os.read(fd, 1)
        if not c:
            raise WireClosed("pipe closed")
        if c == b"\n":
            break
        head += c
        if len(head) > 12 or not c.isdigit():
            raise WireError("bad frame header %r" % head[:16])
    if not head:
        raise WireError("empty frame header")
    n = int(head)
    if n > cap:
        raise WireError("frame of %d bytes over the %d-byte cap" % (n, cap))

    try:
        text = _read_exact(fd, n).decode("utf-8")
        if text.startswith("\ufeff"):  # as json.loads
            raise json.JSONDecodeError("Unexpected UTF-8 BOM (decode using utf-8-sig)", text, 0)
        msg = _DECODER.decode(text)
    except (ValueError, RecursionError) as e:
        raise WireError("frame is not JSON: %s" % str(e)[:80]) from None
    if type(msg) is not dict:
        raise WireError("frame is a %s, not an object" % type(msg).__name__)
    return msg


# ------------------------------------------------------------------------------- values
def _hexint(x):
    return hex(x)


def wire_encode(value, ref_of, depth=0, budget=None):
    """A plain value as its wire form; any other object through ``ref_of(obj) -> [\"h\", ref, type]``
    (which may raise instead). Exact types only: see the module docstring. Raises ValueError past
    :data:`WIRE_MAX_DEPTH` levels or :data:`WIRE_MAX_NODES` parts."""
    if budget is None:
        budget = [WIRE_MAX_NODES]
    budget[0] -= 1
    if budget[0] < 0:
        raise ValueError("value has more than %d parts" % WIRE_MAX_NODES)
    if depth > WIRE_MAX_DEPTH:
        raise ValueError("value nested deeper than %d levels" % WIRE_MAX_DEPTH)
    d = depth + 1
    t = type(value)
    if value is None:
        return ["N"]
    if t is bool:
        return ["b", value]
    if t is int:
        return ["i", _hexint(value)]
    if t is float:
        return ["f", float.hex(value)]
    if t is complex:
        return ["c", float.hex(value.real), float.hex(value.imag)]
    if t is str:
        return ["s", value]
    if t is bytearray:
        return ["Y", base64.b64encode(bytes(value)).decode("ascii")]
    if t is bytes:
        return ["y", base64.b64encode(value).decode("ascii")]
    if t is list:
        return ["l", [wire_encode(v, ref_of, d, budget) for v in list.__iter__(value)]]
    if t is tuple:
        return ["t", [wire_encode(v, ref_of, d, budget) for v in tuple.__iter__(value)]]
    if t is frozenset:
        return ["F", [wire_encode(v, ref_of, d, budget) for v in frozenset.__iter__(value)]]
    if t is set:
        return ["S", [wire_encode(v, ref_of, d, budget) for v in set.__iter__(value)]]
    import sys

    collections = sys.modules.get("collections")
    if t is dict or (collections is not None and t in (collections.Counter, collections.OrderedDict,
                                                       collections.defaultdict)):
        return ["d", [[wire_encode(k, ref_of, d, budget), wire_encode(v, ref_of, d, budget)]
                      for k, v in dict.items(value)]]
    fractions, decimal, numpy = sys.modules.get("fractions"), sys.modules.get("decimal"), sys.modules.get("numpy")
    if numpy is not None and t in set(getattr(numpy, "sctypeDict", {}).values()):
        item = value.item()  # numpy's own scalar type: its Python value, itself checked as plain data
        if type(item) in (bool, int, float, complex, bytes, str):
            return wire_encode(item, ref_of, d, budget)
    if fractions is not None and t is fractions.Fraction:
        return ["q", _hexint(int.__index__(value.numerator)), _hexint(int.__index__(value.denominator))]
    if decimal is not None and t is decimal.Decimal:
        return ["D", str(decimal.Decimal.__str__(value))]
    return ref_of(value)


def _int_hex(s):
    if type(s) is not str or len(s) > 1 << 20:
        raise WireError("bad int")
    try:
        return int(s, 16)
    except ValueError:
        raise WireError("bad int %r" % s[:20]) from None


def _float_hex(s):
    if type(s) is not str or len(s) > 40:
        raise WireError("bad float")
    try:
        return float.fromhex(s)
    except (ValueError, OverflowError):
        raise WireError("bad float %r" % s) from None


def _b64(s):
    if type(s) is not str:
        raise WireError("bad bytes")
    try:
        return base64.b64decode(s.encode("ascii"), validate=True)
    except (ValueError, UnicodeEncodeError):
        raise WireError("bad bytes") from None


def wire_decode(node, handle, budget=None, depth=0):
    """Rebuild a wire value with this process's own built-in types; ``handle(ref, typename)`` for refs.

    Strict: anything but the documented forms raises :class:`WireError`.
    """
    if budget is None:
        budget = [WIRE_MAX_NODES]
    budget[0] -= 1
    if budget[0] < 0:
        raise WireError("value has more than %d parts" % WIRE_MAX_NODES)
    if depth > WIRE_MAX_DEPTH + 1:
        raise WireError("value nested deeper than %d levels" % WIRE_MAX_DEPTH)
    if type(node) is not list or not node or type(node[0]) is not str:
        raise WireError("bad value node")
    tag, n = node[0], len(node)
    d = depth + 1

    def items(x):
        if type(x) is not list:
            raise WireError("bad %s payload" % tag)
        return [wire_decode(v, handle, budget, d) for v in x]

    try:
        if tag == "N" and n == 1:
            return None
        if tag == "b" and n == 2 and type(node[1]) is bool:
            return node[1]
        if tag == "i" and n == 2:
            return _int_hex(node[1])
        if tag == "f" and n == 2:
            return _float_hex(node[1])
        if tag == "c" and n == 3:
            return complex(_float_hex(node[1]), _float_hex(node[2]))
        if tag == "s" and n == 2 and type(node[1]) is str:
            return node[1]
        if tag == "y" and n == 2:
            return _b64(node[1])
        if tag == "Y" and n == 2:
            return bytearray(_b64(node[1]))
        if tag == "l" and n == 2:
            return items(node[1])
        if tag == "t" and n == 2:
            return tuple(items(node[1]))
        if tag == "S" and n == 2:
            return set(items(node[1]))
        if tag == "F" and n == 2:
            return frozenset(items(node[1]))
        if tag == "d" and n == 2 and type(node[1]) is list:
            out = {}
            for pair in node[1]:
                if type(pair) is not list or len(pair) != 2:
                    raise WireError("bad dict item")
                out[wire_decode(pair[0], handle, budget, d)] = wire_decode(pair[1], handle, budget, d)
            return out
        if tag == "q" and n == 3:
            import fractions

            return fractions.Fraction(_int_hex(node[1]), _int_hex(node[2]))
        if tag == "D" and n == 2 and type(node[1]) is str and len(node[1]) < 1 << 16:
            import decimal

            return decimal.Decimal(node[1])
        if tag == "h" and n == 3 and type(node[1]) is int and type(node[2]) is str:
            return handle(node[1], node[2][:200])
    except TypeError as e:  # unhashable set member or dict key
        raise WireError("bad %s value: %s" % (tag, e)) from None
    except (ArithmeticError, ValueError) as e:  # zero denominator, bad Decimal
        if isinstance(e, WireError):
            raise
        raise WireError("bad %s value: %s" % (tag, e)) from None
    raise WireError("unknown value form %r" % (tag[:8],))
