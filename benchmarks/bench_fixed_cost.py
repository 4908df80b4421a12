"""Fixed cost of one run (case load, model compilation, discretisation, start) with and without the
per-process cache of compiled models that workers use, side by side.

Each run goes to t = 1e-6 (one step), so what is timed is the set-up. Run: ``python benchmarks/bench_fixed_cost.py``.
"""

from __future__ import annotations

import time
from pathlib import Path

from harness.case import load_case
from harness.model import build_model
from harness.runs import RunTask, _load, run_task
from harness.simulate import Start, simulate

CASE = str(Path(__file__).resolve().parents[1] / "cases" / "demo_1d_membrane_switch.toml")
OVERRIDES = ("solver.t_end=1e-6", "solver.cells_1d=1000")


def main(repeats: int = 10) -> None:
    case = load_case(CASE, OVERRIDES)
    params = {**case.parameters, "s": 0.24}
    heights = [0.5 + 0.01 * i for i in range(repeats)]
    # naive: load and compile the case for every run
    t0 = time.perf_counter()
    for h in heights:
        c = load_case(CASE, OVERRIDES)
        simulate(c, build_model(c), params, Start("pulse", h))
    naive = (time.perf_counter() - t0) / repeats
    # ours: the worker's cache of compiled models (first run compiles)
    _load.cache_clear()
    tasks = [RunTask(CASE, OVERRIDES, tuple(sorted(params.items())), "pulse", h, 1, 1000) for h in heights]
    t0 = time.perf_counter()
    run_task(tasks[0])
    first = time.perf_counter() - t0
    t0 = time.perf_counter()
    for task in tasks[1:]:
        run_task(task)
    cached = (time.perf_counter() - t0) / (repeats - 1)
    print(f"fixed cost of a 1D run (1000 cells): naive (load + compile each run) {1e3 * naive:.1f} ms; "
          f"first cached run {1e3 * first:.1f} ms; later runs {1e3 * cached:.1f} ms (target < 50 ms); "
          f"ratio naive/cached {naive / cached:.1f}x")


if __name__ == "__main__":
    main()
