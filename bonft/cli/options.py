"""Small helpers shared by the sub-commands: comma lists, checked output paths and atomic JSON output."""
from __future__ import annotations

import json
import os

from bonft._core.checks import MAX_BOOT, MAX_SUBSETS_BOUND, MIN_BOOT, SEED_BOUND
from bonft._core.jsonl import replacing


def no_empty_items(flag: str, text: str | None) -> None:
    """A comma-separated option with an empty item (``1,,2``, ``a,``) is refused, not read as the items left."""
    if text is not None and text.strip() and any(not v.strip() for v in text.split(",")):
        raise ValueError(f"{flag} must be comma-separated values with none empty, got {text!r}")


def parse_list(flag: str, text: str | None, cast=int) -> list | None:
    """``"1,4,16"`` -> ``[1, 4, 16]``; None stays None; an empty item is an error. Errors name the flag and the text."""
    if text is None:
        return None
    no_empty_items(flag, text)
    try:
        out = [cast(v) for v in text.split(",") if v.strip()]
    except ValueError:
        kind, like = ("integers", "1,2,4") if cast is int else ("numbers", "0.4,0.7,1.0")
        raise ValueError(f"{flag} must be comma-separated {kind} like {like}, got {text!r}") from None
    if not out:
        raise ValueError(f"{flag} must list at least one value, got {text!r}")
    return out


def check_boot(flag: str, value: int) -> int:
    """Bootstrap replicates in ``[MIN_BOOT, MAX_BOOT]``: fewer give no percentile interval worth printing (one
    replicate gave a "95% CI"); more cost time and memory (replicates x k values) and do not move one measurably."""
    if value < MIN_BOOT or value > MAX_BOOT:
        raise ValueError(f"{flag} must be between {MIN_BOOT} and {MAX_BOOT:,} bootstrap replicates, got {value:,}")
    return value


def check_ks_in_pools(ks, keys, pools, temperature=None, sources=None) -> None:
    """``--ks`` against the pools of a samples file (``keys``: their prompt ids): a k above the smallest pool is
    refused naming that prompt (and ``temperature``, or ``sources[i]``: the input each pool comes from), since one
    short pool caps k for every prompt."""
    if ks is None:
        return
    if min(ks) < 1:
        raise ValueError(f"--ks must be >= 1, got {min(ks)}")
    sizes = [len(x) for x in pools]
    n_min = min(sizes)
    if max(ks) > n_min == max(sizes):
        raise ValueError(f"--ks must be <= the smallest pool (n={n_min}), got {max(ks)}")
    if max(ks) > n_min:
        i = sizes.index(n_min)
        short = keys[i]
        at = "" if temperature is None else f" at temperature {temperature:g}"
        at += "" if sources is None else f" in {sources[i]}"
        raise ValueError(f"--ks must be <= the smallest pool (n={n_min}: prompt {short!r}{at}; the largest holds "
                         f"{max(sizes)}), got {max(ks)}: one short pool caps k for every prompt, so lower --ks or "
                         f"leave that prompt out")


def check_seed(flag: str, value: int) -> int:
    """A seed in ``[0, 2**63)``: seeds are kept as int64 and ``torch.manual_seed`` overflows from 2**64."""
    if not 0 <= value < SEED_BOUND:
        raise ValueError(f"{flag} must be >= 0 and < 2**63 (seeds are kept as int64; torch.manual_seed overflows "
                         f"from 2**64), got {value}")
    return value


def check_sizes(args) -> None:
    """The knobs that size the work, before any file is read: --n-boot, --seed, --max-subsets (the API's bounds)."""
    check_boot("--n-boot", args.n_boot)
    check_seed("--seed", args.seed)
    m = getattr(args, "max_subsets", None)
    if m is not None and not 2 <= m <= MAX_SUBSETS_BOUND:
        raise ValueError(f"--max-subsets must be between 2 and {MAX_SUBSETS_BOUND:,} k-subsets (each sampled subset "
                         f"draws n random keys at once; 10^6 put the standard error near sd / 1000), got {m:,}")


def add_duplicates_flag(p) -> None:
    p.add_argument("--allow-duplicates", action="store_true",
                   help="accept rows that repeat an earlier row exactly (default: warn with their count)")


def _file_above(path: str) -> str | None:
    """The nearest existing folder above ``path`` when it is not a directory (a file in the way), else None."""
    folder = os.path.dirname(os.path.abspath(path))
    while not os.path.exists(folder):
        folder = os.path.dirname(folder)
    return None if os.path.isdir(folder) else folder


def check_json_path(flag: str, path: str) -> None:
    """``path`` can become a file: not a directory, and no file where one of its folders should be."""
    if os.path.isdir(path) or path.endswith(("/", os.sep)):
        raise ValueError(f"{flag} must be a file path, got a directory: {path}")
    above = _file_above(path)
    if above is not None:
        raise ValueError(f"{flag} must be a file path in a folder, but {above} is a file: {path}")


def check_plot_dir(flag: str, path: str) -> None:
    """``path`` is a directory or can become one: not a file, and no file where one of its folders should be."""
    if os.path.exists(path) and not os.path.isdir(path):
        raise ValueError(f"{flag} must be a directory, got a file: {path}")
    above = _file_above(path)
    if above is not None:
        raise ValueError(f"{flag} must be a directory path, but {above} is a file: {path}")


def check_output_paths(args) -> None:
    """``--json`` and ``--plot-dir`` of a command, before any work (a wrong path found at the end wastes the run)."""
    if getattr(args, "json", None):
        check_json_path("--json", args.json)
    if getattr(args, "plot_dir", None):
        check_plot_dir("--plot-dir", args.plot_dir)


def make_plot_dir(path: str, flag: str = "--plot-dir") -> str:
    """Create the ``--plot-dir`` directory (checked first, so a file in the way is one clear error); returns it."""
    check_plot_dir(flag, path)
    os.makedirs(path, exist_ok=True)
    return path


def write_json_atomic(path: str, obj, *, flag: str = "--json") -> None:
    """Write JSON atomically (:func:`bonft._core.jsonl.replacing`): a crash never leaves half a file.

    A directory at ``path`` (or a file in place of its folder) is a ``ValueError`` naming ``flag``; a folder
    that cannot be written is an ``OSError`` naming ``flag`` and ``path`` (not the temporary file).
    """
    check_json_path(flag, path)
    try:
        os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
        with replacing(path) as f:
            json.dump(obj, f, indent=1, allow_nan=False)
    except OSError as e:
        if e.strerror:
            raise type(e)(e.errno, f"{flag} cannot be written: {e.strerror}", path) from None
        raise


def write_curve_outputs(args, path: str, blocks: list, curves: dict, plot, png: str) -> None:
    """``--json`` (every block of the table) and ``--plot-dir`` (``plot(curves, DIR/png, title=)``) of a curves command."""
    if args.json:
        write_json_atomic(args.json, {"samples": os.path.abspath(path), "blocks": blocks})
        print(f"wrote {args.json}")
    if args.plot_dir:
        make_plot_dir(args.plot_dir)
        out = os.path.join(args.plot_dir, png)
        plot(curves, out, title=os.path.basename(path))
        print(f"wrote {out}")


def add_plot_dir(p, files: str) -> None:
    """``--plot-dir DIR``: the command's PNG files are written into DIR under fixed names (``files``)."""
    p.add_argument("--plot-dir", metavar="DIR", default=None, help=f"write {files} into this directory")
