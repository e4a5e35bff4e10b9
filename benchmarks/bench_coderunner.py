"""Candidates per second through the sandboxed code runner: one at a time, the pool, and the floor.

Three kinds of candidate (our own):

* trivial: ``x = 1`` against ``assert x == 1``;
* typical: the workshop task's kind (``bonft.tasks.workshop``): a one-line helper against its prompt's
  two visible asserts and 26 hidden inputs, one call each;
* hostile: in turn a candidate that hangs (ended at ``wall_time``), one that forks until the
  process limit stops it, and one that allocates past ``memory_mb``.

Each runs through ``CodeRunner`` one candidate at a time (two fresh interpreters per candidate,
``workers`` in parallel) and through ``CodeRunner(pool=True)`` (``workers`` pre-started workers; each
forks three processes per candidate: the tests' process, the PID namespace's init and the
candidate's process, and a supervisor per worker, which never forks, feeds and reads them). The
floor is the pool's ``floor``: one fork of the same pre-started worker that applies the candidate's
isolation (PID, mount, IPC and network namespaces, fresh tmpfs, own uid, limits, seccomp filter) in a
fresh working directory and exits. All in one process on the same machine; the pool's trivial
candidates and the floor run in six alternating rounds of 100 (three of 20 with --quick), so that a
drift of the machine's speed between them does not move their ratio. Goals: the pool at least
250 trivial candidates/s on 2 cores, and within 2x the floor (pool time per candidate / floor time
per candidate <= 2).

Run: python benchmarks/bench_coderunner.py [--quick] [--workers W] [--runs R]  (W: default twice the cores)
Prints, per run: candidates/s; CPU ms per candidate (user + system time of this process, every
process it or the pool's workers reaped, and the workers and their supervisors themselves: what 2
idle cores would have to spend, so candidates per CPU-second is the throughput 1 idle core would
give); page faults per candidate of the pool's processes (minor faults: mostly copy-on-write copies
after a fork, and nearly independent of the machine's load); the ratios to the floor; and the load
average (``os.getloadavg``) before and after. On a shared machine the wall-clock rates say little:
compare the CPU columns.
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


def _children(pid: int) -> list[int]:
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as f:
            return [int(x) for x in f.read().split()]
    except OSError:
        return []


def _stat(pid: int) -> list[str]:
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()
    except OSError:
        return []


def _tree(pids: list[int]) -> tuple[list[float], int]:
    """([CPU seconds of the workers themselves (the forkers), of the children they reaped (the tests'
    processes, inits and candidates), of their live children (the supervisors)], minor page faults of
    all three): proc(5) /proc/PID/stat fields 10-11 (minflt, cminflt) and 14-17."""
    cpu, faults = [0, 0, 0], 0
    for pid in pids:
        f = _stat(pid)
        if f:
            cpu[0] += int(f[11]) + int(f[12])
            cpu[1] += int(f[13]) + int(f[14])
            faults += int(f[7]) + int(f[8])
        for kid in _children(pid):
            f = _stat(kid)
            if f:
                cpu[2] += int(f[11]) + int(f[12])
                faults += int(f[7])
    return [c / os.sysconf("SC_CLK_TCK") for c in cpu], faults


def measure(fn, n: int, pids=lambda: []) -> tuple[float, float, float, list, list[float]]:
    """(candidates/s, CPU ms per candidate, page faults per candidate of ``pids()``'s trees, results,
    CPU ms per candidate of [the forkers, their reaped children, the supervisors, this process])."""
    cpu0, faults0 = _tree(pids())
    c0, t0 = _cpu(), time.perf_counter()
    out = fn(n)
    dt = time.perf_counter() - t0
    c1 = _cpu()
    cpu1, faults1 = _tree(pids())
    parts = [1000 * (b - a) / n for a, b in zip(cpu0, cpu1)] + [1000 * (c1 - c0) / n]
    return n / dt, sum(parts), (faults1 - faults0) / n, out, parts


def interleaved(pool_fn, floor_fn, n: int, rounds: int, pids) -> dict:
    """The pool's trivial candidates and the floor in alternating rounds of ``n // rounds`` each, so
    that a drift of the machine's speed (up to a third within minutes on the development machine)
    weighs on both alike: name -> (candidates/s, CPU ms, faults per candidate, CPU ms per candidate
    by process), each the total over its rounds."""
    m = n // rounds
    acc = {name: [0.0, 0.0, 0.0, [0.0] * 4] for name in ("pool", "floor")}
    for _ in range(rounds):
        for name, fn in (("pool", pool_fn), ("floor", floor_fn)):
            rate, cpu, flt, _, parts = measure(fn, m, pids)
            a = acc[name]
            a[0] += m / rate
            a[1] += cpu * m
            a[2] += flt * m
            a[3] = [x + y * m for x, y in zip(a[3], parts)]
    total = m * rounds
    return {name: (total / a[0], a[1] / total, a[2] / total, [x / total for x in a[3]]) for name, a in acc.items()}


def run_once(args, W: int) -> dict:
    n_single, n_pool, n_hostile = (16, 60, 6) if args.quick else (64, 600, 12)
    load0 = os.getloadavg()
    # wall_time only bounds a stuck candidate: 10 s keeps trivial ones passing on a loaded machine
    opts = dict(wall_time=10.0, memory_mb=256, max_processes=8, workers=W)
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

    rows, split = [], {}
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

        s_rate, s_cpu, _, _, _ = measure(lambda n, rs=rs: batch(n, rs), n_s)
        if kind == "trivial":  # against the floor, in alternating rounds (the time ratio is the goal)
            both = interleaved(lambda n, rp=rp: batch(n, rp), pool.floor, n_p, 3 if args.quick else 6,
                               pool.worker_pids)
            p_rate, p_cpu, p_flt, parts = both["pool"]
            f_rate, f_cpu, f_flt, floor_split = both["floor"]
            res = None
        else:
            p_rate, p_cpu, p_flt, res, parts = measure(lambda n, rp=rp: batch(n, rp), n_p,
                                                       rp.sandbox_pool().worker_pids)
        rows.append((kind, s_rate, s_cpu, p_rate, p_cpu, p_flt))
        split[kind] = parts
        if kind == "hostile":
            print("  hostile verdicts (pool):", sorted({(r.status, r.reason) for r in res}))
    split["floor"] = floor_split
    load1 = os.getloadavg()
    layers = pool.layers
    for r in (pooled, pooled_h):
        r.close()

    print(f"\nload before {load0[0]:.2f} {load0[1]:.2f} {load0[2]:.2f}, after {load1[0]:.2f} {load1[1]:.2f} {load1[2]:.2f}")
    print(f"{'candidates':<10} {'one at a time /s':>17} {'cpu ms':>7} {'pool /s':>9} {'cpu ms':>7} {'/cpu-s':>7} "
          f"{'faults':>7} {'pool / one':>11}")
    for kind, s_rate, s_cpu, p_rate, p_cpu, p_flt in rows:
        print(f"{kind:<10} {s_rate:>17.1f} {s_cpu:>7.1f} {p_rate:>9.1f} {p_cpu:>7.2f} {1000 / p_cpu:>7.0f} "
              f"{p_flt:>7.0f} {p_rate / s_rate:>10.1f}x")
    print(f"{'floor':<10} {'':>17} {'':>7} {f_rate:>9.1f} {f_cpu:>7.2f} {1000 / f_cpu:>7.0f} {f_flt:>7.0f}"
          f"   (one isolated fork, doing nothing)")
    print("\nCPU ms per candidate, pool: forkers | their reaped children (tests' process, init, candidate; the "
          "floor: its one process) | supervisors | this process")
    for kind, parts in split.items():
        print(f"  {kind:<8} " + " | ".join(f"{x:5.2f}" for x in parts))
    trivial = rows[0]
    ratio, cpu_ratio = f_rate / trivial[3], trivial[4] / f_cpu
    print(f"\nGOAL pool >= 250 trivial candidates/s on 2 cores: {trivial[3]:.0f}/s -> "
          f"{'met' if trivial[3] >= 250 else 'NOT MET'} ({2000 / trivial[4]:.0f}/s on 2 idle cores by its CPU, "
          f"{trivial[4]:.2f} ms per candidate)")
    print(f"GOAL pool within 2x the floor's time per candidate: {ratio:.2f}x -> {'met' if ratio <= 2 else 'NOT MET'} "
          f"(CPU per candidate {cpu_ratio:.2f}x the floor's)")
    print(f"layers: {', '.join(layers)}")
    return {"load": load0[0], "rows": rows, "floor": (f_rate, f_cpu, f_flt), "ratio": ratio, "cpu_ratio": cpu_ratio}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer candidates (a smoke run)")
    ap.add_argument("--workers", type=int, default=2 * (os.cpu_count() or 1),
                    help="workers of both runners (default: twice the cores, the pool's default up to 8)")
    ap.add_argument("--runs", type=int, default=1, help="repeat the whole measurement (default 1)")
    args = ap.parse_args()
    if args.workers < 1 or args.runs < 1:
        raise SystemExit(f"--workers and --runs must be >= 1, got {args.workers} and {args.runs}")
    print(f"cores {os.cpu_count()}, workers {args.workers}")
    runs = []
    for i in range(args.runs):
        print(f"\n== run {i + 1} of {args.runs}")
        runs.append(run_once(args, args.workers))
    if args.runs > 1:
        print("\nsummary (trivial): load before, pool /s, pool CPU ms, floor /s, floor CPU ms, time ratio, CPU ratio")
        for r in runs:
            t = r["rows"][0]
            print(f"  {r['load']:5.2f} {t[3]:7.1f} {t[4]:6.2f} {r['floor'][0]:7.1f} {r['floor'][1]:6.2f} "
                  f"{r['ratio']:5.2f}x {r['cpu_ratio']:5.2f}x")


if __name__ == "__main__":
    main()
