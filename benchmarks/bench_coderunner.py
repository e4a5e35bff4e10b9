"""Candidates per second through the sandboxed code runner: one at a time, the pool, and the floor.

Three kinds of candidate (our own):

* trivial: ``x = 1`` against ``assert x == 1``;
* typical: the workshop task's kind (``bonft.tasks.workshop``): a one-line helper against its prompt's
  two visible asserts and 26 hidden inputs, one call each;
* hostile: in turn a candidate that hangs (ended at ``wall_time``), one that forks until the
  process limit stops it, and one that allocates past ``memory_mb``.

Each runs through ``CodeRunner`` one candidate at a time (two fresh interpreters per candidate,
``workers`` in parallel), through ``CodeRunner(pool=True)`` (``workers`` pre-started workers that
fork both processes of each candidate), and, for the floor, through the pool's ``floor``: a fork of
the same pre-started worker that applies the candidate's isolation (PID, mount, IPC and network
namespaces, fresh tmpfs, own uid, limits, seccomp filter) in a fresh working directory and exits.
All in one process on the same machine. Goals: the pool at least 250 trivial candidates/s on 2
cores, and within 2x the floor (pool time per candidate / floor time per candidate <= 2).

Run: python benchmarks/bench_coderunner.py [--quick] [--workers W]  (W: default twice the cores)
Prints candidates/s, CPU ms per candidate (this process and its children), the ratios, and the
machine's load (``os.getloadavg``) before and after: timings on a shared machine say little.
"""
from __future__ import annotations

import argparse
import os
import resource
import time

from bonft.tasks.workshop import hidden_seed, solution_source, unit_tests
from bonft.verifiers import CodeRunner

TRIVIAL = ("x = 1", "assert x == 1")
# the workshop task's own kind: a one-line helper against its prompt's 2 visible asserts and 26 hidden inputs
_PROMPT = "boxes 4: f(9)=3 f(6)=2 ?"
TYPICAL = (solution_source("-(-x//4)"), unit_tests("boxes", 4, [(9, 3), (6, 2)], hidden_seed(_PROMPT)))
HOSTILE = [
    ("while True:\n    pass", "pass"),
    ("import os\nwhile True:\n    os.fork()", "pass"),
    ("x = bytearray(1 << 34)", "pass"),
]


def _cpu() -> float:
    s, c = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return s.ru_utime + s.ru_stime + c.ru_utime + c.ru_stime


def _tree_cpu(pids: list[int]) -> float:
    """CPU seconds of live processes and the children they reaped (/proc/PID/stat fields 14-17, proc(5))."""
    tot = 0
    for pid in pids:
        try:
            with open(f"/proc/{pid}/stat") as f:
                fields = f.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        tot += sum(int(x) for x in fields[11:15])
    return tot / os.sysconf("SC_CLK_TCK")


def measure(fn, n: int, pids=lambda: []) -> tuple[float, float, list]:
    """(candidates/s, CPU ms per candidate of this process, its reaped children and ``pids()``, results)."""
    before = _tree_cpu(pids())
    c0, t0 = _cpu(), time.perf_counter()
    out = fn(n)
    dt = time.perf_counter() - t0
    cpu = _cpu() - c0 + _tree_cpu(pids()) - before
    return n / dt, 1000 * cpu / n, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer candidates (a smoke run)")
    ap.add_argument("--workers", type=int, default=2 * (os.cpu_count() or 1),
                    help="workers of both runners (default: twice the cores, the pool's default up to 8)")
    args = ap.parse_args()
    W = args.workers
    n_single, n_pool, n_hostile = (16, 60, 6) if args.quick else (64, 600, 12)
    load0 = os.getloadavg()
    print(f"cores {os.cpu_count()}, workers {W}, load before {load0[0]:.2f} {load0[1]:.2f} {load0[2]:.2f}")
    opts = dict(wall_time=2.0, memory_mb=256, max_processes=8, workers=W)
    single = CodeRunner({}, **opts)
    single.run_code([TRIVIAL] * W)  # the interpreter probe
    pooled = CodeRunner({}, pool=True, **opts)
    pool = pooled.sandbox_pool()
    pool.floor(4 * W)
    pooled.run_code([TRIVIAL] * 4 * W)
    hostile_opts = dict(opts, wall_time=1.0)
    single_h, pooled_h = CodeRunner({}, **hostile_opts), CodeRunner({}, pool=True, **hostile_opts)
    single_h.run_code([TRIVIAL])
    pooled_h.run_code([TRIVIAL] * W)

    rows = []
    for kind, job, n_s, n_p, rs, rp in (("trivial", [TRIVIAL], n_single, n_pool, single, pooled),
                                        ("typical", [TYPICAL], n_single, n_pool, single, pooled),
                                        ("hostile", HOSTILE, n_hostile, n_hostile, single_h, pooled_h)):
        def batch(n, runner, job=job):
            res = runner.run_code([job[i % len(job)] for i in range(n)])
            if kind != "hostile":
                assert all(r.passed for r in res), {(r.status, r.reason) for r in res}
            else:
                assert not any(r.passed for r in res), {(r.status, r.reason) for r in res}
            return res

        s_rate, s_cpu, _ = measure(lambda n, rs=rs: batch(n, rs), n_s)
        p_rate, p_cpu, res = measure(lambda n, rp=rp: batch(n, rp), n_p, rp.sandbox_pool().worker_pids)
        rows.append((kind, s_rate, s_cpu, p_rate, p_cpu))
        if kind == "hostile":
            print("  hostile verdicts (pool):", sorted({(r.status, r.reason) for r in res}))
    f_rate, f_cpu, _ = measure(pool.floor, n_pool, pool.worker_pids)
    load1 = os.getloadavg()

    print(f"\n{'candidates':<10} {'one at a time /s':>17} {'cpu ms':>7} {'pool /s':>9} {'cpu ms':>7} "
          f"{'pool / one':>11}")
    for kind, s_rate, s_cpu, p_rate, p_cpu in rows:
        print(f"{kind:<10} {s_rate:>17.1f} {s_cpu:>7.1f} {p_rate:>9.1f} {p_cpu:>7.1f} {p_rate / s_rate:>10.1f}x")
    print(f"{'floor':<10} {'':>17} {'':>7} {f_rate:>9.1f} {f_cpu:>7.1f}   (bare isolated fork, doing nothing)")
    trivial = rows[0]
    ratio = f_rate / trivial[3]
    print(f"\npool trivial vs floor: {ratio:.2f}x the floor's time per candidate "
          f"(goal <= 2x: {'met' if ratio <= 2 else 'not met'}); "
          f"{trivial[3]:.0f} trivial/s (goal >= 250/s on 2 cores: {'met' if trivial[3] >= 250 else 'not met'})")
    print(f"layers: {', '.join(pool.layers)}; load after {load1[0]:.2f} {load1[1]:.2f} {load1[2]:.2f}")
    for r in (pooled, pooled_h):
        r.close()


if __name__ == "__main__":
    main()
