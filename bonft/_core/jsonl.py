"""Reading JSON Lines files with errors that name the file and the line (the pool file, prompt files),
and writing a file atomically (:func:`replacing`)."""
from __future__ import annotations

import contextlib
import json
import os
import stat
import tempfile
from typing import IO, Iterator


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


@contextlib.contextmanager
def replacing(path, *, binary: bool = False) -> Iterator[IO]:
    """Write ``path`` atomically: yields a temporary file in ``path``'s folder, which replaces ``path``
    (``os.replace``) only once the body returned and the file is flushed and fsync'ed.

    Any failure, a full disk or Ctrl-C included, removes the temporary file and leaves ``path``
    as it was: a reader never sees half a file. An existing file keeps its mode (a new one: 0o666
    less the umask); a symbolic link is written through to its target.
    """
    target = os.path.realpath(os.fspath(path))
    folder = os.path.dirname(target)
    try:
        mode = stat.S_IMODE(os.stat(target).st_mode)
    except FileNotFoundError:
        mode = new_file_mode()
    fd, tmp = tempfile.mkstemp(prefix=f".{os.path.basename(target)}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "wb" if binary else "w", **({} if binary else {"encoding": "utf-8"})) as fh:
            yield fh
            fh.flush()
            os.fchmod(fh.fileno(), mode)
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    with contextlib.suppress(OSError):  # the rename itself on disk (best effort: not every filesystem allows it)
        dir_fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)


def new_file_mode() -> int:
    """The mode ``open()`` gives a new file: 0o666 less the umask (the writers that use a private temporary file,
    0o600, set it back to this)."""
    return 0o666 & ~_umask()


def _umask() -> int:
    """The process's umask (Linux: read from /proc; elsewhere set and restored at once: a thread creating a file meanwhile would get it)."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def replace_text(path, text: str) -> None:
    """Write ``text`` to ``path`` atomically (:func:`replacing`)."""
    with replacing(path) as fh:
        fh.write(text)
