"""The samples file: JSON Lines, one scored sample per line.

Written by ``bonft sample``, read by ``bonft estimate`` and ``bonft plan``::

    {"prompt_id": "L017", "score": 0.73, "reward": 1, "temperature": 0.7, "n_tokens": 143, "response": "..."}

- ``prompt_id`` (str or int; ints are keys too, ``3`` and ``"3"`` are the same prompt),
- ``score`` (number, the verifier's score, higher is better),
- ``reward`` (number or true/false, the true reward),
- ``answer`` (str, int or null, optional): the final answer extracted from the response, the key that
  majority and weighted vote count (``bonft.strategies``); surface forms of one answer share it;
  null (no answer could be extracted) votes alone: it gets a key of its own,
- ``temperature`` (number >= 0, optional; two temperatures are the same when they are equal as float32, so
  0.699999988079071, a 0.7 stored as float32, is 0.7: :func:`same_temperature`), ``n_tokens`` (int >= 0, optional), ``response`` (str, optional;
  never read back here, so files with long responses load as fast as short ones),
- ``sample`` (int or str, optional): the sample's index in its prompt's pool; with it, identical
  samples are told apart and only a repeated (prompt, temperature, sample) counts as a repeated row,
- ``prompt`` (str, optional): the prompt text, to join rows back to the data; read (``text_field="prompt"``)
  only to pair files from different runs by their prompts (``bonft compare``).

Field names can be renamed on reading (``score_field="rm_score"`` ...). Blank
lines are skipped (and a UTF-8 byte-order mark at the start of the file); every other line is parsed on its own (a JSON value never
spans two lines). A malformed line (bad JSON, nested too deeply, not UTF-8, a
number beyond float64 or, for ``n_tokens``, beyond int64) raises ``ValueError``
naming the file, line number and field; rows repeated exactly
are reported (``duplicates=``). Writing is atomic (temp file + ``os.replace``), so a crash never
leaves a half-written file in place of a good one; the file keeps its mode (a new one gets the
usual mode from the umask), and a symbolic link is written through (the link stays, its target changes).

Caution: ``response`` may hold model-written code; nothing here runs it, and
nothing should run it outside a sandbox.
"""
from __future__ import annotations

import json
import math
import os
import warnings
from dataclasses import dataclass
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from bonft._core.checks import as_float_array
from bonft._core.jsonl import decode_utf8, parse_object, replacing, unique_object

__all__ = ["SampleTable", "DuplicateRowsWarning", "FailedVerdictsWarning", "read_samples", "write_samples", "group_pools",
           "temperatures_of", "same_temperature", "temperature_label"]


@dataclass
class SampleTable:
    """Columns of a samples file, one entry per sample (N rows).

    prompt_keys: (N,) str keys; scores, rewards: (N,) float64;
    temperatures: (N,) float64 or None when the file has no temperature field;
    n_tokens: (N,) int64 or None; answers: (N,) str answer keys or None; prompts: (N,) str prompt texts or None.
    """

    prompt_keys: np.ndarray
    scores: np.ndarray
    rewards: np.ndarray
    temperatures: np.ndarray | None = None
    n_tokens: np.ndarray | None = None
    answers: np.ndarray | None = None
    prompts: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.scores)


# ----------------------------------------------------------------------------- reading


def _parse_lines(name: str, lines: list[str], numbers) -> list[dict]:
    """Non-blank lines as dicts, each line parsed on its own (a value never spans lines, nor do two share one).

    On any failure the lines are parsed again one by one through :func:`parse_object`, which names the
    first malformed line. Joining the lines into one JSON array would be faster but is wrong: two lines
    that are each invalid can join into two valid objects (an unterminated string closed on the next line).
    """
    loads = json.JSONDecoder(object_pairs_hook=unique_object).decode  # a key given twice is refused
    try:
        rows = [loads(t) for t in lines]
    except (ValueError, RecursionError):  # JSONDecodeError, a repeated key, too many digits, nesting
        rows = None
    if rows is None or any(type(r) is not dict for r in rows):
        rows = [parse_object(text, name, no, "a sample", unique_keys=True) for text, no in zip(lines, numbers)]
    return rows


def _column(name: str, rows: list[dict], numbers: list[int], field: str, option: str, *, required: bool):
    """The values of one field, or None when an optional field is absent from every row."""
    try:
        return [r[field] for r in rows]
    except KeyError:
        pass
    missing = [i for i, r in enumerate(rows) if field not in r]
    if not required and len(missing) == len(rows):
        return None
    i = missing[0]
    have = ", ".join(sorted(rows[i])) or "none"
    raise ValueError(
        f"{name} line {numbers[i]}: missing field {field!r} (fields there: {have}); "
        f"if the file calls it something else, pass {option}=NAME (--{option.replace('_', '-')} NAME on the command line)"
    )


def _numbers(name, vals, numbers, field, *, allow_bool: bool, integer: bool = False) -> np.ndarray:
    ok = (int, bool) if integer else (int, float, bool)
    kinds = set(map(type, vals))
    bad_kinds = kinds - set(ok) | ({bool} & kinds if not allow_bool else set())
    if bad_kinds:
        i = next(i for i, v in enumerate(vals) if type(v) in bad_kinds)
        want = "an integer" if integer else "a number"
        raise ValueError(f"{name} line {numbers[i]}: field {field!r} must be {want}, got {vals[i]!r}")
    try:
        arr = np.array(vals, dtype=np.int64 if integer else np.float64)
    except OverflowError:  # a JSON integer beyond int64 / float64
        i = next(i for i, v in enumerate(vals) if not _fits(v, integer))
        digits = len(str(abs(vals[i])))
        raise ValueError(f"{name} line {numbers[i]}: field {field!r} must fit in "
                         f"{'a 64-bit integer (|x| < 2**63)' if integer else 'a float64 (|x| < 1.8e308)'}, "
                         f"got an integer of {digits} digits") from None
    if not integer:
        bad = ~np.isfinite(arr)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            why = "" if vals[i] != vals[i] else " (Infinity, or a number beyond the float64 range |x| < 1.8e308)"
            raise ValueError(f"{name} line {numbers[i]}: field {field!r} must be finite, got {vals[i]!r}{why}")
        _check_exact_ints(name, vals, arr, numbers, field)
    return arr


_EXACT_INT = 2**53  # float64 holds every integer of magnitude <= 2**53; 2**53 + 1 rounds to 2**53


def _check_exact_ints(name, vals, arr: np.ndarray, numbers, field) -> None:
    """A JSON integer beyond +-2**53 is refused: as float64 it rounds, and neighbours (9007199254740993 and
    9007199254740992) would tie (the Python estimators refuse such scores too)."""
    for i in np.flatnonzero(np.abs(arr) >= _EXACT_INT):  # candidates only: JSON ints are exact Python ints here
        v = vals[i]
        if type(v) is int and abs(v) > _EXACT_INT:
            raise ValueError(f"{name} line {numbers[i]}: field {field!r} must be an integer of magnitude <= 2**53 "
                             f"(numbers are read as float64, where larger integers round and neighbours tie), got {v}; "
                             f"rank them first, or write them as floats if rounding is meant")


def _fits(v, integer: bool) -> bool:
    """Whether a JSON number converts to int64 (``integer``) or to a finite float64 without overflow."""
    if integer:
        return -(2**63) <= v < 2**63
    try:
        float(v)
    except OverflowError:
        return False
    return True


DUPLICATES = ("warn", "error", "allow")


class DuplicateRowsWarning(UserWarning):
    """A samples file repeats some rows exactly."""


class FailedVerdictsWarning(UserWarning):
    """Rows of a samples file mark a verdict their verifier failed to give (field ``failed``): a stand-in that judged nothing."""


def _note_failed(name: str, rows: list, numbers: list[int]) -> None:
    """Warn when rows carry ``failed`` (the verifiers that failed on them, as bonft's own samples files mark it)."""
    hit = [i for i, r in enumerate(rows) if r.get("failed")]
    if hit:
        names = sorted({str(v) for i in hit for v in (rows[i]["failed"] if isinstance(rows[i]["failed"], list)
                                                      else [rows[i]["failed"]])})
        warnings.warn(f"{name}: {len(hit)} of {len(rows)} rows mark a verdict their verifier failed to give (field "
                      f"'failed': {', '.join(names)}; first on line {numbers[hit[0]]}): the stand-in score there (0, "
                      f"or its batch's lowest below 0) judged nothing but is counted; fix the verifier and score again for "
                      f"numbers that mean what they say",
                      FailedVerdictsWarning, stacklevel=3)


def _check_duplicates(name: str, lines: list[str], numbers, mode: str, indexed: list | None = None) -> None:
    """Warn or raise when a non-blank line repeats an earlier one exactly (after trimming spaces), or, when rows
    carry a sample index (``indexed``: one (prompt, temperature, sample) key per row), repeats its key."""
    keys = [t.strip() for t in lines] if indexed is None else indexed
    extra = len(keys) - len(set(keys))
    if not extra:
        return
    first: dict = {}
    for key, no in zip(keys, numbers):
        if key in first:
            pair = f"line {no} repeats line {first[key]}"
            break
        first[key] = no
    if indexed is not None:
        msg = (f"{name}: {extra} of {len(keys)} rows repeat the prompt, temperature and sample index of an earlier "
               f"row ({pair}); a file concatenated with itself doubles its pools. Renumber the sample field, or "
               f"allow them (duplicates='allow', --allow-duplicates on the command line)")
    else:
        msg = (f"{name}: {extra} of {len(keys)} rows repeat an earlier row exactly ({pair}); a file concatenated "
               f"with itself doubles its pools. If they are distinct samples that happen to be identical (common "
               f"for rows without a response or a sample index), give each row a sample index (field 'sample') "
               f"or allow them (duplicates='allow', --allow-duplicates on the command line)")
    if mode == "error":
        raise ValueError(msg)
    warnings.warn(msg, DuplicateRowsWarning, stacklevel=3)


def read_samples(
    path,
    *,
    prompt_field: str = "prompt_id",
    score_field: str = "score",
    reward_field: str = "reward",
    temperature_field: str = "temperature",
    tokens_field: str = "n_tokens",
    duplicates: str = "warn",
    answer_field: str = "answer",
    sample_field: str = "sample",
    text_field: str | None = None,
    temperature_required: bool = False,
) -> SampleTable:
    """Load a samples JSONL file into columns.

    ``prompt_field``/``score_field``/``reward_field`` are required on every line;
    ``temperature_field``/``tokens_field``/``answer_field`` are optional but, when present, must be
    on every line (temperatures and token counts >= 0). ``text_field`` (e.g. ``"prompt"``; default None: not read) fills ``prompts`` when the
    field is there, a string on every line. ``temperature_required=True`` makes ``temperature_field``
    required on every line (a field named on purpose that is missing would otherwise pool every
    temperature into one pool). Raises ``FileNotFoundError`` for a missing file and
    ``ValueError`` (``samples.jsonl line 17: ...``) for a malformed one: bad JSON,
    JSON nested too deeply, or bytes that are not UTF-8.

    duplicates: what to do with lines that repeat an earlier line exactly (a file
    concatenated with itself doubles every pool): ``"warn"`` (a
    :class:`DuplicateRowsWarning` with their count), ``"error"`` (``ValueError``)
    or ``"allow"`` (distinct samples that happen to be identical, e.g. short
    answers in a file without a sample index; ``bonft sample`` writes one).
    When every row carries ``sample_field`` (the sample's index in its pool),
    identical samples with different indices are not repeats: only a row
    repeating the (prompt, temperature, sample index) of an earlier row is.
    """
    for opt, v in (("prompt_field", prompt_field), ("score_field", score_field), ("reward_field", reward_field),
                   ("temperature_field", temperature_field), ("tokens_field", tokens_field),
                   ("answer_field", answer_field), ("sample_field", sample_field),
                   *((("text_field", text_field),) if text_field is not None else ())):
        if not isinstance(v, str) or not v:
            raise TypeError(f"{opt} must be a non-empty str, got {v!r}")
    if duplicates not in DUPLICATES:
        raise ValueError(f"duplicates must be one of {DUPLICATES}, got {duplicates!r}")
    if not isinstance(temperature_required, bool):
        raise TypeError(f"temperature_required must be a bool, got {type(temperature_required).__name__} "
                        f"{temperature_required!r}")
    path = os.fspath(path)
    name = os.path.basename(path)
    with open(path, "rb") as f:
        raw = f.read()
    if raw.startswith(b"\xef\xbb\xbf"):  # a UTF-8 byte-order mark (editors on Windows write one): not part of the data
        raw = raw[3:]
    text = decode_utf8(raw, name)
    lines = text.split("\n")
    if lines and not lines[-1].strip():
        lines.pop()  # the newline that ends the last line
    numbers = [i + 1 for i, t in enumerate(lines) if t.strip()]  # file line number of each non-blank line
    if len(numbers) < len(lines):
        lines = [lines[i - 1] for i in numbers]
    if not lines:
        raise ValueError(f"{name}: no samples (the file is empty)")
    rows = _parse_lines(name, lines, numbers)

    ids = _column(name, rows, numbers, prompt_field, "prompt_field", required=True)
    kinds = set(map(type, ids))
    if kinds - {str, int}:
        i = next(i for i, v in enumerate(ids) if type(v) not in (str, int))
        raise ValueError(f"{name} line {numbers[i]}: field {prompt_field!r} must be a string or an integer, got {ids[i]!r}")
    prompt_keys = np.array([str(v) for v in ids] if int in kinds else ids, dtype=str)

    scores = _numbers(name, _column(name, rows, numbers, score_field, "score_field", required=True),
                      numbers, score_field, allow_bool=False)
    rewards = _numbers(name, _column(name, rows, numbers, reward_field, "reward_field", required=True),
                       numbers, reward_field, allow_bool=True)
    temps = _column(name, rows, numbers, temperature_field, "temperature_field", required=temperature_required)
    if temps is not None:
        temps = _numbers(name, temps, numbers, temperature_field, allow_bool=False)
        if (temps < 0).any():
            i = int(np.flatnonzero(temps < 0)[0])
            raise ValueError(f"{name} line {numbers[i]}: field {temperature_field!r} must be >= 0 (a sampling "
                             f"temperature), got {float(temps[i])}")
    toks = _column(name, rows, numbers, tokens_field, "tokens_field", required=False)
    if toks is not None:
        toks = _numbers(name, toks, numbers, tokens_field, allow_bool=False, integer=True)
        if (toks < 0).any():
            i = int(np.flatnonzero(toks < 0)[0])
            raise ValueError(f"{name} line {numbers[i]}: field {tokens_field!r} must be >= 0 tokens, got {int(toks[i])}")
    answers = _column(name, rows, numbers, answer_field, "answer_field", required=False)
    if answers is not None:
        bad = [i for i, v in enumerate(answers) if v is not None and type(v) not in (str, int)]
        if bad:
            raise ValueError(f"{name} line {numbers[bad[0]]}: field {answer_field!r} must be a string, an integer or "
                             f"null, got {answers[bad[0]]!r}")
        answers = np.array([str(v) if v is not None else f"\x00none{no}" for v, no in zip(answers, numbers)], dtype=str)
    index = _column(name, rows, numbers, sample_field, "sample_field", required=False)
    if index is not None:
        bad = [i for i, v in enumerate(index) if isinstance(v, bool) or type(v) not in (str, int)]
        if bad:
            raise ValueError(f"{name} line {numbers[bad[0]]}: field {sample_field!r} must be an integer or a string "
                             f"(the sample's index in its pool), got {index[bad[0]]!r}")
        at = temps if temps is not None else [None] * len(index)
        index = [(str(p), None if t is None else float(t), str(v)) for p, t, v in zip(prompt_keys, at, index)]
    texts = _column(name, rows, numbers, text_field, "text_field", required=False) if text_field is not None else None
    if texts is not None:
        bad = [i for i, v in enumerate(texts) if type(v) is not str]
        if bad:
            raise ValueError(f"{name} line {numbers[bad[0]]}: field {text_field!r} must be a string (the prompt's text), "
                             f"got {texts[bad[0]]!r}")
        texts = np.array(texts, dtype=object)
    if duplicates != "allow":  # after the checks of every field: a malformed file errors first
        _check_duplicates(name, lines, numbers, duplicates, index)
    _note_failed(name, rows, numbers)
    return SampleTable(prompt_keys=prompt_keys, scores=scores, rewards=rewards, temperatures=temps, n_tokens=toks,
                       answers=answers, prompts=texts)


# ----------------------------------------------------------------------------- writing


# the optional fields read_samples reads (``prompt`` only with text_field="prompt"): on every row or on none
_OPTIONAL = ("temperature", "n_tokens", "answer", "sample", "prompt")


def _number(i: int, key: str, v: Any, *, allow_bool: bool) -> None:
    """A JSON number read_samples takes: finite, within float64 (bools only where allowed)."""
    if (isinstance(v, bool) and not allow_bool) or not isinstance(v, (int, float)):
        raise TypeError(f"rows[{i}][{key!r}] must be a number, got {type(v).__name__} {v!r}")
    if isinstance(v, int) and not isinstance(v, bool):
        if abs(v) > _EXACT_INT:
            raise ValueError(f"rows[{i}][{key!r}] must be an integer of magnitude <= 2**53 (read_samples reads float64, "
                             f"where larger integers round and neighbours tie), got {v}")
    elif not math.isfinite(v):
        raise ValueError(f"rows[{i}][{key!r}] must be finite, got {v!r}")


def _check_row(i: int, row: Any) -> None:
    """Refuse, naming the row and field, whatever :func:`read_samples` would refuse in this row."""
    if not isinstance(row, dict):
        raise TypeError(f"rows[{i}] must be a dict, got {type(row).__name__}")
    for key in ("prompt_id", "score", "reward"):
        if key not in row:
            raise ValueError(f"rows[{i}] must have the field {key!r}, got fields {sorted(map(str, row))}")
    pid = _plain(row["prompt_id"])
    if isinstance(pid, bool) or not isinstance(pid, (str, int)):
        raise TypeError(f"rows[{i}]['prompt_id'] must be a str or int, got {type(pid).__name__}")
    _number(i, "score", _plain(row["score"]), allow_bool=False)
    _number(i, "reward", _plain(row["reward"]), allow_bool=True)
    if "temperature" in row:
        t = _plain(row["temperature"])
        _number(i, "temperature", t, allow_bool=False)
        if t < 0:
            raise ValueError(f"rows[{i}]['temperature'] must be >= 0 (a sampling temperature), got {t!r}")
    if "n_tokens" in row:
        n = _plain(row["n_tokens"])
        if isinstance(n, bool) or not isinstance(n, int):
            raise TypeError(f"rows[{i}]['n_tokens'] must be an int, got {type(n).__name__} {n!r}")
        if not 0 <= n < 2**63:
            raise ValueError(f"rows[{i}]['n_tokens'] must be >= 0 and < 2**63 (a token count), got {n}")
    if "answer" in row:
        a = _plain(row["answer"])
        if a is not None and (isinstance(a, bool) or not isinstance(a, (str, int))):
            raise TypeError(f"rows[{i}]['answer'] must be a str, an int or None, got {type(a).__name__} {a!r}")
    if "sample" in row:
        v = _plain(row["sample"])
        if isinstance(v, bool) or not isinstance(v, (str, int)):
            raise TypeError(f"rows[{i}]['sample'] must be an int or a str (the sample's index in its pool), "
                            f"got {type(v).__name__} {v!r}")
    if "prompt" in row and not isinstance(row["prompt"], str):
        raise TypeError(f"rows[{i}]['prompt'] must be a str (the prompt's text), got {type(row['prompt']).__name__}")


class _RowCheck:
    """Rows checked one by one (a generator of rows is never held in memory whole): each as :func:`_check_row`,
    and each with the optional fields the first row has, no more, no fewer."""

    def __init__(self) -> None:
        self.count = 0
        self.optional: set[str] = set()

    def __call__(self, row: Any) -> None:
        i = self.count
        _check_row(i, row)
        have = {key for key in _OPTIONAL if key in row}
        if i == 0:
            self.optional = have
        elif have != self.optional:
            key = next(k for k in _OPTIONAL if (k in have) != (k in self.optional))
            if key in self.optional:
                raise ValueError(f"rows[{i}] must have the field {key!r} as rows[0] has (read_samples refuses a field "
                                 f"on some rows only), got fields {sorted(map(str, row))}")
            raise ValueError(f"rows[{i}] has the field {key!r}, which rows[0] lacks (read_samples refuses a field "
                             f"on some rows only); give it to every row or to none")
        self.count += 1

    def finish(self) -> None:
        if not self.count:
            raise ValueError("rows must hold at least one sample, got none (read_samples refuses an empty file)")


def _plain(v: Any) -> Any:
    """numpy scalars -> Python scalars (what ``json`` writes)."""
    return v.item() if isinstance(v, np.generic) else v


def _json_default(v: Any) -> Any:
    if isinstance(v, np.generic):
        return v.item()
    raise TypeError(f"{type(v).__name__} is not JSON serializable")


def write_samples(path, rows: Iterable[dict]) -> int:
    """Write ``rows`` (dicts with at least prompt_id, score, reward) as JSONL; returns the row count.

    numpy scalars are written as plain numbers. A row :func:`read_samples` would
    refuse raises (``rows[12]['score'] must be finite, got nan``), as do no rows
    at all and an optional field (temperature, n_tokens, answer, sample, prompt)
    on some rows only; a list of rows is checked whole before anything is written,
    a generator row by row (it is never held in memory whole). Atomic: rows go to a temporary
    file in the target's folder, which replaces it only once every row is
    written and flushed; a failure leaves ``path`` untouched. An existing file
    keeps its mode (a new one: 0o666 less the umask, as ``open`` gives); a
    symbolic link is written through to its target and stays a link.
    """
    path = os.fspath(path)
    if isinstance(rows, (str, bytes, Mapping)):
        raise TypeError(f"rows must be an iterable of dicts, got {type(rows).__name__}"
                        + (" (wrap a single row in a list)" if isinstance(rows, Mapping) else ""))
    if not isinstance(rows, Iterable):
        raise TypeError(f"rows must be an iterable of dicts, got {type(rows).__name__}")
    check = _RowCheck()
    whole = isinstance(rows, Sequence)  # a list is checked whole first; a generator (not held whole) row by row
    if whole:
        for row in rows:
            check(row)
        check.finish()
    target = os.path.realpath(path)  # a symlink stays one: its target is replaced
    if os.path.isdir(target):
        raise ValueError(f"path must be a file path, got a directory: {path}")
    if not os.path.isdir(os.path.dirname(target)):
        raise FileNotFoundError(f"path's folder does not exist: {os.path.dirname(target)} (path={path})")
    count = 0
    with replacing(path) as f:  # a temporary file beside the target, renamed onto it once whole
        encode = json.JSONEncoder(separators=(",", ":"), allow_nan=False, default=_json_default).encode
        for i, row in enumerate(rows):
            if not whole:
                check(row)  # before the row is written
            try:
                f.write(encode(row) + "\n")
            except (TypeError, ValueError) as e:
                raise type(e)(f"rows[{i}] cannot be written as JSON: {e}") from None
            count += 1
        check.finish()
    return count


# ----------------------------------------------------------------------------- pools


def same_temperature(a, b):
    """Whether temperatures ``a`` and ``b`` (numbers or arrays, broadcast) are the same: equal as float32.

    The one rule of every command and of :func:`group_pools`: a temperature written as float32 (0.7 stored as
    0.699999988079071) is the temperature a user types (0.7); float32 keeps 7 significant digits, far finer than
    any temperature grid. :func:`temperature_label` prints a temperature in a form that matches it.
    """
    return np.asarray(a, dtype=np.float32) == np.asarray(b, dtype=np.float32)


def temperature_label(t: float) -> str:
    """A temperature as a user would type it: the shortest decimal that is the same temperature (``'0.7'`` for
    0.699999988079071, under :func:`same_temperature`)."""
    return str(np.float32(t))


def temperatures_of(table: SampleTable) -> list[float]:
    """Sorted distinct temperatures in the table ([] when it has no temperature column); temperatures that are the
    same under :func:`same_temperature` count once (the smallest stands for them)."""
    if not isinstance(table, SampleTable):
        raise TypeError(f"table must be a SampleTable, got {type(table).__name__}")
    if table.temperatures is None:
        return []
    u = np.unique(table.temperatures)
    new = np.ones(len(u), dtype=bool)
    new[1:] = u[1:].astype(np.float32) != u[:-1].astype(np.float32)
    return [float(t) for t in u[new]]


def group_pools(table: SampleTable, *, temperature: float | None = None, with_answers: bool = False):
    """Split a table into per-prompt pools: ``-> (keys, score_pools, reward_pools)``.

    ``with_answers=True`` appends ``answer_pools`` (str keys; ``ValueError`` when the table
    has no answer column).

    keys: list of prompt ids in order of first appearance; ``score_pools[p]``,
    ``reward_pools[p]``: (n_p,) float64 in file order. With several
    temperatures in the table, ``temperature`` must pick one (pools mixing
    temperatures would estimate no real sampling setup). ``temperature`` selects the rows whose temperature is
    the same under :func:`same_temperature` (equal as float32).
    """
    temps = temperatures_of(table)
    if with_answers and table.answers is None:
        raise ValueError("table must have an 'answer' column for answer pools (majority / weighted vote), got none")
    keep = np.ones(len(table), dtype=bool)
    if temperature is None:
        if len(temps) > 1:
            raise ValueError(f"temperature must pick one of the table's temperatures "
                             f"[{', '.join(map(temperature_label, temps))}] (pools would mix them), got None")
        ids, s, r = table.prompt_keys, table.scores, table.rewards
    else:
        temperature = float(as_float_array("temperature", temperature, ndim=0))
        if table.temperatures is None:
            raise ValueError(f"temperature must be None for a table without temperatures, got {temperature}")
        keep = same_temperature(table.temperatures, temperature)
        if not keep.any():
            raise ValueError(f"temperature must be one of [{', '.join(map(temperature_label, temps))}], got {temperature!r}")
        ids, s, r = table.prompt_keys[keep], table.scores[keep], table.rewards[keep]
    uniq, first, inv = np.unique(ids, return_index=True, return_inverse=True)
    rank = np.empty(len(uniq), dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(len(uniq))  # unique index -> first-appearance order
    g = rank[inv]  # (N,) group of each row
    order = np.argsort(g, kind="stable")  # rows grouped, file order inside a group
    cuts = np.flatnonzero(np.diff(g[order])) + 1
    keys = [str(k) for k in uniq[np.argsort(first, kind="stable")]]
    if with_answers:
        return keys, np.split(s[order], cuts), np.split(r[order], cuts), np.split(table.answers[keep][order], cuts)
    return keys, np.split(s[order], cuts), np.split(r[order], cuts)
