"""``bonft check-verifier module:function --examples FILE.jsonl``: test a verifier before using it."""
from __future__ import annotations

HELP = "test a verifier for determinism, failures, agreement with labels and over-optimisation"
DESCRIPTION = (
    "Load a verifier ('module:function' or 'path/to/file.py:function'), score the example pools in "
    "FILE.jsonl (one sample per line: {\"prompt\", \"response\", \"reward\"?, \"label\"?}) several times "
    "and report determinism, failure rate, score range, latency, accuracy / ROC AUC and the best-of-k "
    "vs pass@k curve (the best true reward among k). Exit status 0 when no problem was found, 1 otherwise. Caution: this imports and "
    "runs the verifier's code."
)


def add_arguments(p) -> None:
    p.add_argument("verifier", help="'module:function' or 'path/to/file.py:function'")
    p.add_argument("--examples", required=True, metavar="FILE.jsonl", help="example samples, one JSON object per line")
    p.add_argument("--repeats", type=int, default=2, help="times each sample is scored (default 2)")
    p.add_argument("--threshold", type=float, default=0.5, help="score at or above which a sample counts as accepted")
    p.add_argument("--wall-time", type=float, default=None, help="seconds allowed per verifier call (default: no limit)")
    p.add_argument("--max-failure-rate", type=float, default=0.0, help="failure rate that still passes (default 0)")
    p.add_argument("--plot-dir", metavar="DIR", default=None, help="write verifier_check.png (best-of-k vs pass@k) into this directory")
    p.add_argument("--json", metavar="PATH.json", default=None, help="write the report as JSON here")


def run(args) -> int:
    import os

    from bonft.cli.options import check_output_paths, make_plot_dir, write_json_atomic
    from bonft.testing import check_verifier, read_examples
    from bonft.verifiers import load_verifier

    check_output_paths(args)
    if not os.path.isfile(args.examples):
        raise FileNotFoundError(f"--examples must be an existing JSONL file, got {args.examples!r}")
    with open(args.examples, "rb") as fh:
        raw = fh.read()
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError as e:
        line = raw.count(b"\n", 0, e.start) + 1
        raise ValueError(f"--examples file {args.examples} line {line}: not UTF-8 text "
                         f"(byte {raw[e.start]:#04x}); save the file as UTF-8") from None
    verifier = load_verifier(args.verifier)
    report = check_verifier(verifier, read_examples(args.examples), repeats=args.repeats, threshold=args.threshold,
                            timeout=args.wall_time, max_failure_rate=args.max_failure_rate)
    print(report)
    if args.plot_dir:
        print(f"plot: {report.plot(os.path.join(make_plot_dir(args.plot_dir), 'verifier_check.png'))}")
    if args.json:
        write_json_atomic(args.json, report.to_dict())  # atomic: never a half-written report
        print(f"json: {args.json}")
    return 0 if report.ok else 1
