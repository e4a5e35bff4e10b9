"""Reading JSON Lines files with errors that name the file and the line (the pool file, prompt files)."""
from __future__ import annotations

import json


def decode_utf8(raw: bytes, name: str) -> str:
    """File bytes -> text; bytes that are not UTF-8 raise ``ValueError`` naming the line and column."""
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as e:
        line = raw.count(b"\n", 0, e.start) + 1
        col = e.start - (raw.rfind(b"\n", 0, e.start) + 1) + 1
        raise ValueError(f"{name} line {line}: not UTF-8 text (byte {raw[e.start]:#04x} at column {col}); "
                         f"save the file as UTF-8") from None


def parse_object(text: str, name: str, no: int, what: str) -> dict:
    """One line -> a dict; bad JSON, JSON nested too deeply or a non-object raise ``ValueError``
    naming the file and line. ``what`` says what one line holds (``"a sample"``, ``"a prompt"``)."""
    try:
        row = json.loads(text)
    except json.JSONDecodeError as e:
        raise ValueError(f"{name} line {no}: not valid JSON ({e.msg.removesuffix(' at')} at column {e.colno})") from None
    except RecursionError:
        raise ValueError(f"{name} line {no}: JSON nested too deeply ({what} is one flat JSON object)") from None
    except ValueError as e:  # an integer with more digits than Python converts (sys.get_int_max_str_digits)
        raise ValueError(f"{name} line {no}: a number too long to read ({str(e).split(';')[0]})") from None
    if type(row) is not dict:
        raise ValueError(f"{name} line {no}: expected a JSON object ({what}), got {type(row).__name__}")
    return row
