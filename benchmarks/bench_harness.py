"""Overhead of the validation harness per run (store, keys, scheduling, pickling) against solver time.

The same ~20 demo runs go (i) through a plain loop of ``run_task`` in this process, the straightforward
alternative, and (ii) through ``execute()`` into a fresh store: inline (``workers=0``: store and bookkeeping
only) and in a local pool (one worker: pickling, IPC and pool start-up; two workers: the speed-up).
It also times the pieces (store put/has, pickling a record) and the start of a pool per start method.
Target: harness overhead < 5 % of solver time on the demo. Run:
``python benchmarks/bench_harness.py [--dim 1|2] [--cells N] [--runs N] [--repeat N]``.
"""

from __future__ import annotations

import argparse
import multiprocessing
import pickle
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import replace
from pathlib import Path

import numpy as np

from harness.case import load_case
from harness.execute import execute, task_key
from harness.runs import RunTask, run_task
from harness.store import Store

ROOT = Path(__file__).resolve().parents[1]
CASE = str(ROOT / "cases" / "demo_1d_membrane_switch.toml")


def demo_tasks(cells: int, runs: int, dim: int = 1) -> list[RunTask]:
    """``runs`` demo runs across the sweep: noise and two pulse heights per point."""
    overrides = (f"solver.cells_{dim}d={cells}",)
    case = load_case(CASE, overrides)
    starts = (("noise", 1e-3), ("pulse", 1.0), ("pulse", 3.0))
    points = np.linspace(case.sweep.values[0], case.sweep.values[-1], -(-runs // len(starts)))
    tasks = [RunTask(CASE, overrides, tuple(sorted({**case.parameters, case.sweep.parameter: float(v)}.items())),
                     kind, h, dim, cells) for v in points for kind, h in starts]
    return tasks[:runs]


def _noop(x: int) -> int:
    return x


def pool_start(method: str) -> float:
    """Seconds from creating a pool to the first result of a trivial task."""
    t0 = time.perf_counter()
    ctx = multiprocessing.get_context(method)
    with ProcessPoolExecutor(max_workers=1, mp_context=ctx) as pool:
        pool.submit(_noop, 1).result()
    return time.perf_counter() - t0


def timed(fn) -> tuple[float, object]:
    """Wall seconds of ``fn()`` and its value."""
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, default=200, help="cells per side (the demo's own: 200 in 1D, 48 in 2D)")
    ap.add_argument("--dim", type=int, default=1, choices=(1, 2))
    ap.add_argument("--runs", type=int, default=20)
    ap.add_argument("--repeat", type=int, default=5, help="repeats; the fastest of each is shown")
    args = ap.parse_args()
    tasks = demo_tasks(args.cells, args.runs, args.dim)
    run_task(tasks[0])  # warm: build and compile the model once, as a worker does
    keys = [task_key(t) for t in tasks]
    variants = (("plain loop of run_task", None), ("execute(), inline", 0), ("execute(), pool of 1", 1),
                ("execute(), pool of 2", 2))
    best = {label: float("inf") for label, _ in variants}
    outside = {label: float("inf") for label, _ in variants}  # wall time not spent inside the solver runs
    with tempfile.TemporaryDirectory() as tmp:
        # step: start the pools and compile the model in their workers, on other keys (a one-off cost)
        warm = [replace(t, start_value=t.start_value * 1.01) for t in tasks[1:3]]
        for workers in (1, 2):
            t_cold, _ = timed(lambda workers=workers: execute(warm, Store(Path(tmp) / f"warm{workers}.h5"),
                                                              key_of=task_key, workers=workers, progress=False))
            print(f"pool of {workers}: cold start (processes, imports, model) plus 2 runs {t_cold:.2f} s, once per "
                  "driver")
        # step: the same runs through each route, each time into a fresh store, interleaved against drift
        for rep in range(args.repeat):
            for label, workers in variants:
                if workers is None:
                    t, recs = timed(lambda: [run_task(t) for t in tasks])
                    loop = recs
                else:
                    store = Store(Path(tmp) / f"r{rep}w{workers}.h5")
                    t, recs = timed(lambda store=store, workers=workers: execute(
                        tasks, store, key_of=task_key, workers=workers, progress=False))
                assert [r.outcome for r in recs] == [r.outcome for r in loop]
                best[label] = min(best[label], t)
                outside[label] = min(outside[label], t - sum(r.wall for r in recs))
        t_resume, _ = timed(lambda: execute(tasks, Store(Path(tmp) / "r0w0.h5"), key_of=task_key, workers=0,
                                            progress=False))
        # step: the pieces
        store = Store(Path(tmp) / "pieces.h5")
        t_put, _ = timed(lambda: [store.put(r) for r in loop])
        t_has, _ = timed(lambda: [store.has(k) for k in keys * 1000])
        t_key, _ = timed(lambda: [task_key(t) for t in tasks])
        t_pickle, _ = timed(lambda: [pickle.loads(pickle.dumps(r)) for r in loop])
        t_cons, _ = timed(store.consolidate)
    solver = sum(r.wall for r in loop)
    print(f"{len(tasks)} demo runs in {args.dim}D at {args.cells} cells, fastest of {args.repeat}; outcomes: "
          + ", ".join(f"{o} {sum(r.outcome == o for r in loop)}" for o in sorted({r.outcome for r in loop})))
    t_loop = best["plain loop of run_task"]
    for label, _ in variants:
        print(f"  {label:24s} {best[label]:7.3f} s  {100 * (best[label] - t_loop) / t_loop:+6.1f} % vs the loop")
    print(f"  rerun with all stored    {t_resume:7.3f} s  (resume: nothing recomputed)")
    per = 1e3 / len(tasks)
    has_ns = 1e9 * t_has / (1000 * len(keys))
    print(f"per run: solver {solver * per:.1f} ms; store.put {t_put * per:.2f} ms, has {has_ns:.0f} ns, "
          f"key {t_key * per:.2f} ms, pickle round trip of a record {t_pickle * per:.3f} ms; consolidate "
          f"{t_cons * per:.2f} ms")
    base = outside["plain loop of run_task"]
    for label in ("execute(), inline", "execute(), pool of 1"):
        extra = outside[label] - base
        print(f"harness overhead, {label}: {extra * per:.1f} ms/run = {100 * extra / solver:.1f} % of solver time "
              "(wall outside the runs beyond the loop's; target < 5 %)")
    print(f"speed-up of the pool of 2 over the loop: {t_loop / best['execute(), pool of 2']:.2f}x")
    print("pool start to first result: " + ", ".join(f"{m} {pool_start(m):.2f} s"
                                                        for m in multiprocessing.get_all_start_methods()))


if __name__ == "__main__":
    main()
