"""Small helpers shared by the sub-commands: comma lists and atomic JSON output."""
from __future__ import annotations

import json
import os
import tempfile


def parse_list(flag: str, text: str | None, cast=int) -> list | None:
    """``"1,4,16"`` -> ``[1, 4, 16]``; None stays None. Errors name the flag and the text."""
    if text is None:
        return None
    try:
        out = [cast(v) for v in text.split(",") if v.strip()]
    except ValueError:
        kind, like = ("integers", "1,2,4") if cast is int else ("numbers", "0.4,0.7,1.0")
        raise ValueError(f"{flag} must be comma-separated {kind} like {like}, got {text!r}") from None
    if not out:
        raise ValueError(f"{flag} must list at least one value, got {text!r}")
    return out


def write_json_atomic(path: str, obj) -> None:
    """Write JSON to a temporary file beside ``path``, then rename: a crash never leaves half a file."""
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".bonft-", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            json.dump(obj, f, indent=1, allow_nan=False)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
