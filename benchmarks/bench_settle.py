"""Time whole runs to a settled state on the P1 disk: the split backend's handover near rest, side by side.

Run ``python benchmarks/bench_settle.py`` (about a minute). The problem is that of ``bench_solvers.py`` (a
pulse on the mass-conserved polarity model), run until the relative rate stays below 1e-6 over 50 time units
(or t = 1e4), at rtol 1e-4 (the case files' default) and 1e-3. Near rest the ``"split"`` backend hands over to
the exact sparse LU of the coupled system once the rate (or the state's change over a step divided by its
length) falls below its ``rest``; each row runs one species route with one ``rest``. Printed per row: wall time
(best of 2), accepted steps, factorisations (``nlu``: SuperLU species factors, then coupled LU after the
handover), the time the run settled,
the relative difference of the final state from the first row's, and the time against the first row's.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench_solvers import DIFFUSION, jacobian, pulse, reaction  # noqa: E402

from solvers.fem import disk_p1  # noqa: E402
from solvers.settle import SettleRule  # noqa: E402
from solvers.stepping import integrate  # noqa: E402

# (species route, rest): None is the default (3e-5); 1e-3 was the default before multigrid species solves
ROWS = (("multigrid", None), ("multigrid", 1e-3), ("superlu", None), ("superlu", 1e-3))


def settle_run(disc, rtol: float, species: str, rest: float | None):
    """One run to a settled state; the best wall time of two and the result."""
    options = {"species": species} if rest is None else {"species": species, "rest": rest}
    best, res = np.inf, None
    for _ in range(2):
        start = time.perf_counter()
        res = integrate(disc, DIFFUSION, reaction, jacobian, pulse(disc), 1e4, rtol=rtol, atol=1e-9,
                        settle=SettleRule(1e-6, 50.0), backend="split", backend_options=options)
        best = min(best, time.perf_counter() - start)
    return best, res


def main(argv: list[str] | None = None) -> None:
    """Run every row at both tolerances and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--disk-level", type=int, default=6, help="disk refinement (6: 12481 nodes)")
    args = parser.parse_args(argv)
    disc = disk_p1(5.0, refine=args.disk_level)
    print(f"P1 disk, {disc.m} nodes, to a settled state (rate < 1e-6 over 50) or t = 1e4")
    print(f"{'rtol':>7}  {'species':<10}{'rest':>10}{'seconds':>9}{'steps':>7}{'nlu':>5}{'settled at':>12}"
          f"{'diff':>10}{'t / first':>11}")
    for rtol in (1e-4, 1e-3):
        first = None
        for species, rest in ROWS:
            seconds, res = settle_run(disc, rtol, species, rest)
            if first is None:
                first = (seconds, res.u)
            diff = np.linalg.norm(res.u - first[1]) / np.linalg.norm(first[1])
            label = "default" if rest is None else f"{rest:g}"
            print(f"{rtol:>7.0e}  {species:<10}{label:>10}{seconds:>9.2f}{res.nsteps:>7d}{res.nlu:>5d}"
                  f"{res.t_final:>12.0f}{diff:>10.1e}{seconds / first[0]:>10.2f}x  {res.status}")


if __name__ == "__main__":
    main()
