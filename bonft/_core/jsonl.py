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


class DuplicateKeyError(ValueError):
    """A JSON object names one key twice (``json`` would keep the last value without a word)."""

    def __init__(self, key: str) -> None:
        super().__init__(f"duplicate key {key!r}")
        self.key = key


def unique_object(pairs: list) -> dict:
    """``object_pairs_hook`` for ``json.loads`` that refuses a key given twice in one object."""
    d = dict(pairs)
    if len(d) != len(pairs):
        seen: set = set()
        for k, _ in pairs:
            if k in seen:
                raise DuplicateKeyError(k)
            seen.add(k)
    return d


def parse_object(text: str, name: str, no: int, what: str, *, unique_keys: bool = False) -> dict:
    """One line -> a dict; bad JSON, JSON nested too deeply or a non-object raise ``ValueError``
    naming the file and line. ``what`` says what one line holds (``"a sample"``, ``"a prompt"``).
    ``unique_keys``: a key given twice in one object raises ``ValueError`` naming it (else the last wins)."""
    try:
        row = json.loads(text, object_pairs_hook=unique_object) if unique_keys else json.loads(text)
    except DuplicateKeyError as e:
        raise ValueError(f"{name} line {no}: key {e.key!r} appears twice in one object (which value is meant is "
                         f"unclear); keep one") from None
    except json.JSONDecodeError as e:
        raise ValueError(f"{name} line {no}: not valid JSON ({e.msg.removesuffix(' at')} at column {e.colno})") from None
    except RecursionError:
        raise ValueError(f"{name} line {no}: JSON nested too deeply ({what} is one flat JSON object)") from None
    except ValueError as e:  # an integer with more digits than Python converts (sys.get_int_max_str_digits)
        raise ValueError(f"{name} line {no}: a number too long to read ({str(e).split(';')[0]})") from None
    if type(row) is not dict:
        raise ValueError(f"{name} line {no}: expected a JSON object ({what}), got {type(row).__name__}")
    return row
