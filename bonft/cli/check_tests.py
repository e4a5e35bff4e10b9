"""``bonft check-tests TESTS.jsonl``: can these unit tests be passed without solving the task?"""
from __future__ import annotations

HELP = "run gaming probes against unit tests used as a reward; exit 1 when any probe passes"
DESCRIPTION = (
    "Read TESTS.jsonl (one {\"prompt\": str, \"tests\": str} per line: the test code CodeRunner runs for that "
    "prompt), run every probe of bonft.testing.probe_code_tests through the sandboxed CodeRunner and print one "
    "line per prompt (which probes passed, what to change) and a summary table. Exit status 0 when no probe "
    "passed, 1 when one did. Caution: your tests run as written (in the trusted process); the probes are our "
    "own code, not model output. A clean result means these generic probes fail, not that the tests cannot be gamed."
)


def add_arguments(p) -> None:
    p.add_argument("tests", metavar="TESTS.jsonl", help="one {\"prompt\", \"tests\"} object per line")
    p.add_argument("--probes", default=None, metavar="A,B",
                   help="probes to run (default: all but lying_operators, which runs the tests in process "
                        "beside a lying object and is run only when named)")
    p.add_argument("--wall-time", type=float, default=5.0, help="seconds per probe candidate (default 5)")
    p.add_argument("--memory-mb", type=int, default=512, help="memory limit per process (default 512)")
    p.add_argument("--workers", type=int, default=None, help="candidates run in parallel (default: up to 4)")
    p.add_argument("--json", metavar="PATH.json", default=None, help="write the report as JSON here")


def run(args) -> int:
    import os

    from bonft.cli.options import check_output_paths, parse_list, write_json_atomic
    from bonft.testing import PROBES, probe_code_tests
    from bonft.verifiers import CodeRunner
    from bonft.verifiers.probes import read_code_tests

    check_output_paths(args)
    if not os.path.isfile(args.tests):
        raise FileNotFoundError(f"TESTS.jsonl must be an existing file, got {args.tests!r}")
    tests = read_code_tests(args.tests)
    if not tests:
        raise ValueError(f"TESTS.jsonl must hold at least one prompt, got an empty file {args.tests!r}")
    probes = parse_list("--probes", args.probes, cast=str) or list(PROBES)
    runner = CodeRunner(tests, wall_time=args.wall_time, memory_mb=args.memory_mb, workers=args.workers)
    report = probe_code_tests(runner, probes=probes)
    print(report)
    if args.json:
        write_json_atomic(args.json, report.to_dict())
        print(f"json: {args.json}")
    return 0 if report.ok else 1
