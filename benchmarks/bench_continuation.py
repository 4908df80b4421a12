"""Time the reduced system's full diagram (all branches, orbits from any Hopf point, regime boundaries) beside
the naive alternative, and write the figure.

The naive alternative locates each regime change by bisection on the point-wise analysis alone (HSS by Newton
from the neighbouring sweep point, then `spike_analysis`), to 1e-8 of the sweep's span, without any
continuation; it stops at the first change of label, which near a fold may be a sliver of `unresolved` (slow
passage past the fold's ghost) rather than the fold itself.
Run: ``python benchmarks/bench_continuation.py [--case FILE] [--plot FILE]``; the default case is the
three-species `ref_1d_two_membrane.toml`, where the full diagram should take under ten seconds.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from harness.case import load_case
from harness.equilibria import baseline_hss
from harness.figures import plane_path, plot_prediction
from harness.model import build_model
from harness.periodic import diagram_cycles
from harness.predict import _family, predict_boundaries, predict_case, predict_diagram, pulse_setup
from harness.spike import spike_analysis

ROOT = Path(__file__).resolve().parents[1]


def _naive_boundaries(case, model, points, xtol: float = 1e-8) -> list[float]:
    """Regime changes by plain bisection on the point-wise regime, to ``xtol`` of the span."""
    family = _family(case, model)
    species, sign = pulse_setup(case, model)
    totals = model.totals(case.guess) if len(model.conservation) else None
    values = [p.value for p in points]
    span = max(values) - min(values)
    out = []
    for a, b in zip(points[:-1], points[1:]):
        if a.regime == b.regime or a.hss is None:
            continue
        lo, hi, guess = a.value, b.value, a.hss
        while abs(hi - lo) > xtol * span:
            mid = 0.5 * (lo + hi)
            kin = family(mid)
            eq = baseline_hss(kin, guess, totals)
            if spike_analysis(kin, eq, species, sign).regime == a.regime:
                lo, guess = mid, guess if eq is None else eq.state
            else:
                hi = mid
        out.append(0.5 * (lo + hi))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", default=str(ROOT / "cases" / "ref_1d_two_membrane.toml"))
    parser.add_argument("--plot", default="bench_continuation.png", help="figure to write (and its _plane twin)")
    args = parser.parse_args()
    case = load_case(args.case)
    model = build_model(case)
    t0 = time.perf_counter()
    points = predict_case(case, model)
    t_points = time.perf_counter() - t0
    t0 = time.perf_counter()
    diagram = predict_diagram(case, model, points)
    t_branches = time.perf_counter() - t0
    t0 = time.perf_counter()
    values = [p.value for p in points]
    cycles = diagram_cycles(_family(case, model), diagram, (min(values), max(values)))
    t_cycles = time.perf_counter() - t0
    t0 = time.perf_counter()
    bounds = predict_boundaries(case, model, points, diagram)
    t_bounds = time.perf_counter() - t0
    full = t_branches + t_cycles + t_bounds
    t0 = time.perf_counter()
    naive = _naive_boundaries(case, model, points)
    t_naive = time.perf_counter() - t0
    print(f"case {Path(args.case).name}: {len(points)} sweep points, {len(diagram.branches)} branches "
          f"({sum(len(b.parameter) for b in diagram.branches)} continued points), {len(diagram.points)} special "
          f"points, {len(cycles)} orbit families")
    print(f"  point-wise predict (not part of the diagram)   {t_points:8.3f} s")
    print(f"  branches + special points                       {t_branches:8.3f} s")
    print(f"  periodic orbits                                 {t_cycles:8.3f} s")
    print(f"  regime boundaries                               {t_bounds:8.3f} s")
    print(f"  full diagram                                    {full:8.3f} s  (target < 10 s)")
    print(f"  naive bisection on the point-wise regime        {t_naive:8.3f} s  (ratio naive / ours "
          f"{t_naive / max(t_bounds + t_branches, 1e-9):.2f}, boundaries only)")
    for b in bounds:
        print(f"  boundary {b.parameter} = {b.value:.12g} ({b.kind}, {b.branch}): {b.between[0]} -> {b.between[1]}")
    for v in naive:
        print(f"  naive boundary at {v:.12g}")
    t0 = time.perf_counter()
    plot_prediction(case, model, points, args.plot, diagram=diagram, boundaries=bounds, cycles=cycles)
    print(f"  figures {args.plot}, {plane_path(args.plot)} in {time.perf_counter() - t0:.3f} s")


if __name__ == "__main__":
    main()
