"""Time `rdcheck predict` on a 200-point sweep, per stage, beside the naive alternative.

The naive alternative is what a hand-written script does: a fresh Newton solve from the case's guess at
every point (no branch following), scipy's `fsolve` with finite-difference Jacobians, and the local states
by a dense scan plus `brentq`. Run: ``python benchmarks/bench_predict.py [--case FILE] [--points N]``.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from harness.case import load_case
from harness.equilibria import trace_baseline
from harness.linear import linear_analysis
from harness.model import build_model
from harness.predict import predict_case, pulse_setup
from harness.spike import spike_analysis

ROOT = Path(__file__).resolve().parents[1]


def _naive_hss(case, model) -> float:
    """Seconds for fsolve (finite-difference Jacobian) from the guess at every point."""
    from scipy.optimize import fsolve

    guess = np.array([case.guess[s] for s in model.species])
    w = model.conservation
    totals = w @ guess
    t0 = time.perf_counter()
    for p in case.points():
        kin = model.kinetics(p)

        def residual(u, kin=kin):
            f = kin.f(u)
            if len(w):
                f = f.copy()
                f[-len(w):] = w @ u - totals  # one equation per law replaced (a typical script's trick)
            return f

        fsolve(residual, guess, full_output=True)
    return time.perf_counter() - t0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", default=str(ROOT / "cases" / "ref_1d_two_membrane.toml"))
    parser.add_argument("--points", type=int, default=200)
    args = parser.parse_args()
    t0 = time.perf_counter()
    case = load_case(args.case)
    lo, hi = case.sweep.values[0], case.sweep.values[-1]
    case = load_case(args.case, [f"sweep.values={{ start = {lo}, stop = {hi}, num = {args.points} }}"])
    model = build_model(case)
    t_build = time.perf_counter() - t0

    kin = [model.kinetics(p, case.sweep.parameter) for p in case.points()]
    guess = np.array([case.guess[s] for s in model.species])
    t0 = time.perf_counter()
    trace = trace_baseline(kin, guess, case.sweep.values)
    t_follow = time.perf_counter() - t0
    species, sign = pulse_setup(case, model)
    t0 = time.perf_counter()
    spikes = [spike_analysis(k, e, species, sign) for k, e in zip(kin, trace.states)]
    t_spike = time.perf_counter() - t0
    t0 = time.perf_counter()
    for k, e in zip(kin, trace.states):
        if e is not None:
            linear_analysis(k, e.state, case.domain.shape, case.domain.size)
    t_linear = time.perf_counter() - t0
    t0 = time.perf_counter()
    predict_case(case, model)
    t_total = time.perf_counter() - t0
    t_naive = _naive_hss(case, model)

    regimes = {}
    for s in spikes:
        regimes[s.regime] = regimes.get(s.regime, 0) + 1
    n = len(case.sweep.values)
    print(f"case {Path(args.case).name}: {n} points, species {model.n}, slow {int(model.slow.sum())}")
    print(f"  load + compile          {t_build:8.3f} s")
    print(f"  follow baseline HSS     {t_follow:8.3f} s   ({1e3 * t_follow / n:.2f} ms/point)")
    print(f"  spike-limit analysis    {t_spike:8.3f} s   ({1e3 * t_spike / n:.2f} ms/point)")
    print(f"  linear analysis         {t_linear:8.3f} s   ({1e3 * t_linear / n:.2f} ms/point)")
    print(f"  predict_case, all       {t_total:8.3f} s")
    print(f"  naive HSS (fsolve from the guess at every point): {t_naive:.3f} s; "
          f"ratio naive/ours for the HSS stage: {t_naive / max(t_follow, 1e-12):.2f}")
    print(f"  regimes: {regimes}")


if __name__ == "__main__":
    main()
