"""`rdcheck predict`: spike-limit and linear predictions at every sweep point, as data, JSON and a table."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .case import Case
from .continuation import Boundary, Diagram, reduced_diagram, regime_boundaries
from .equilibria import baseline_hss, trace_baseline
from .linear import LinearVerdict, linear_analysis
from .model import Model
from .spike import SpikePrediction, spike_analysis

__all__ = [
    "PointPrediction",
    "predict_boundaries",
    "predict_diagram",
    "predict_case",
    "prediction_json",
    "prediction_table",
    "pulse_setup",
]


@dataclass(frozen=True)
class PointPrediction:
    """Both predictions at one sweep point."""

    params: dict[str, float]
    value: float
    hss: np.ndarray | None
    spike: SpikePrediction
    linear: LinearVerdict | None
    lost_reason: str | None = None

    @property
    def regime(self) -> str:
        """The spike-limit regime (DESIGN.md names)."""
        return self.spike.regime

    @property
    def threshold(self) -> float | None:
        """The predicted pulse height in the case's pulse direction, or None."""
        return self.spike.threshold


def pulse_setup(case: Case, model: Model) -> tuple[tuple[str, ...], int]:
    """Pulse species and sign: from `starts.pulse` (sign of its height), else every slow species, upward."""
    if case.pulse is None:
        return tuple(s for s, slow in zip(model.species, model.slow) if slow), 1
    sign = -1 if case.pulse.height is not None and case.pulse.height < 0 else 1
    return case.pulse.species, sign


def predict_case(case: Case, model: Model) -> list[PointPrediction]:
    """Follow the baseline HSS along the sweep and analyse it at every point."""
    points = case.points()
    kinetics = [model.kinetics(p, case.sweep.parameter) for p in points]
    guess = np.array([case.guess[s] for s in model.species])
    trace = trace_baseline(kinetics, guess, case.sweep.values)
    species, sign = pulse_setup(case, model)
    out = []
    for params, kin, eq, reason in zip(points, kinetics, trace.states, trace.reasons):
        spike = spike_analysis(kin, eq, species, sign)
        linear = linear_analysis(kin, eq.state, case.domain.shape, case.domain.size) if eq is not None else None
        out.append(PointPrediction(params=params, value=params[case.sweep.parameter],
                                   hss=None if eq is None else eq.state, spike=spike, linear=linear,
                                   lost_reason=reason))
    return out


def _family(case: Case, model: Model):
    name = case.sweep.parameter

    def family(p: float):
        return model.kinetics({**case.parameters, name: p}, name)

    return family


def predict_diagram(case: Case, model: Model, points: Sequence[PointPrediction]) -> Diagram | None:
    """Branches of the reduced system over the sweep (see `harness.continuation`), seeded from the points'
    HSS and local states; None for a sweep of one point or without any HSS."""
    if len(points) < 2 or all(p.hss is None for p in points):
        return None
    locals_ = [[ls.values for ls in p.spike.local_states if not ls.is_hss] for p in points]
    return reduced_diagram(_family(case, model), case.sweep.parameter, [p.value for p in points],
                           [p.hss for p in points], locals_,
                           totals=model.totals(case.guess) if len(model.conservation) else None)


def predict_boundaries(case: Case, model: Model, points: Sequence[PointPrediction],
                       diagram: Diagram | None = None) -> list[Boundary]:
    """Regime boundaries between the sweep points, at the special points of the continued branches where one
    explains the change (see `harness.continuation.regime_boundaries`); the regime between sweep points is
    the point-wise analysis of `predict_case` at the HSS continued there."""
    diagram = predict_diagram(case, model, points) if diagram is None else diagram
    if diagram is None:
        return []
    family = _family(case, model)
    species, sign = pulse_setup(case, model)
    totals = model.totals(case.guess) if len(model.conservation) else None

    def regime_at(p: float, guess: np.ndarray) -> str:
        kin = family(p)
        return spike_analysis(kin, baseline_hss(kin, guess, totals), species, sign).regime

    # step: orbits of the local dynamics (only where a local Hopf point exists): their folds can move a regime
    extra = ()
    if any(pt.kind == "hopf" and pt.branch == "local" for pt in diagram.points):
        from .periodic import cycle_fold_points, diagram_cycles

        values = [p.value for p in points]
        extra = cycle_fold_points(diagram_cycles(family, diagram, (min(values), max(values)), branches=("local",)))
    return regime_boundaries(diagram, [p.value for p in points], [p.regime for p in points],
                             [p.hss for p in points], regime_at, extra=extra)


def _boundaries_json(case: Case, model: Model, points: Sequence[PointPrediction],
                     boundaries: Sequence[Boundary] | None = None) -> dict:
    """`boundaries` for the JSON; a numerical failure of the continuation is reported, never a crash."""
    if boundaries is not None:
        return {"boundaries": [b.as_json() for b in boundaries]}
    try:
        with np.errstate(all="ignore"):
            return {"boundaries": [b.as_json() for b in predict_boundaries(case, model, points)]}
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
        return {"boundaries": [], "boundaries_error": f"continuation failed: {exc}"}


def _num(x: float | None) -> float | None:
    """A JSON-safe number: non-finite values become None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _point_json(model: Model, p: PointPrediction) -> dict:
    s, lin = p.spike, p.linear
    slow = [name for name, is_slow in zip(model.species, model.slow) if is_slow]
    return {
        "params": dict(p.params),
        "regime": p.regime,
        "reason": s.reason,
        "threshold": _num(s.threshold),
        "threshold_up": _num(s.threshold_up),
        "threshold_down": _num(s.threshold_down),
        "threshold_boundary": _num(s.threshold_boundary),
        "threshold_ode": _num(s.threshold_ode),
        "unbounded_above": _num(s.unbounded_above),
        "hss": None if p.hss is None else {k: float(v) for k, v in zip(model.species, p.hss)},
        "well_mixed_stable": s.well_mixed_stable,
        "spike_stable": s.spike_stable,
        "local_states": [{"values": {k: float(v) for k, v in zip(slow, ls.values)}, "stable": bool(ls.stable)}
                         for ls in s.local_states],
        "turing_unstable": bool(lin.turing_unstable) if lin else False,
        "line_turing_unstable": bool(lin.line_turing_unstable) if lin else False,
        "fastest_wavelength": _num(lin.fastest_wavelength) if lin else None,
        "domain_mode_wavelength": _num(lin.mode_wavelength) if lin else None,
        "diffusion_ratio": _num(lin.ratio) if lin else None,
        "critical_ratio_line": _num(lin.critical_ratio_line) if lin else None,
        "critical_ratio_domain": _num(lin.critical_ratio_domain) if lin else None,
        "baseline_lost": p.lost_reason,
    }


def prediction_json(case: Case, model: Model, points: Sequence[PointPrediction],
                    boundaries: Sequence[Boundary] | None = None) -> dict:
    """The `predict --json` object of DESIGN.md (`points` with `params`, `regime`, `threshold`, `hss`, ...);
    ``boundaries`` (from `predict_boundaries`) saves locating them again when the caller has them."""
    return {
        "case": case.path,
        "model": model.name,
        "sweep_parameter": case.sweep.parameter,
        "species": list(model.species),
        "slow": [bool(x) for x in model.slow],
        "split": model.split_reason,
        "conservation": [[str(c) for c in row] for row in model.conservation_exact],
        "totals": [float(t) for t in model.totals(case.guess)],
        "domain": {"shape": case.domain.shape, "size": list(case.domain.size)},
        "points": [_point_json(model, p) for p in points],
        **_boundaries_json(case, model, points, boundaries),
    }


def _fmt(x: float | None, digits: int = 4) -> str:
    if x is None or not math.isfinite(x):
        return "-"
    return f"{x:.{digits}g}"


def prediction_table(case: Case, model: Model, points: Sequence[PointPrediction]) -> str:
    """A plain-text table, one row per sweep point."""
    slow = ", ".join(s for s, flag in zip(model.species, model.slow) if flag)
    head = [f"{model.name}: sweep over {case.sweep.parameter}; slow: {slow} ({model.split_reason})"]
    if len(model.conservation_exact):
        laws = "; ".join(" + ".join(f"{c}*{s}" for c, s in zip(row, model.species) if c != 0)
                         for row in model.conservation_exact)
        head.append(f"conserved: {laws}")
    cols = [case.sweep.parameter, *model.species, "regime", "threshold", "well-mixed", "linear", "wavelength"]
    rows = []
    for p in points:
        hss = [_fmt(v) for v in p.hss] if p.hss is not None else ["-"] * model.n
        lin = p.linear
        verdict = "-" if lin is None else ("turing" if lin.turing_unstable else
                                          "unstable" if not lin.well_mixed_stable else "stable")
        wavelength = _fmt(lin.mode_wavelength) if lin is not None and lin.turing_unstable else "-"
        wm = "-" if p.spike.well_mixed_stable is None else ("stable" if p.spike.well_mixed_stable else "unstable")
        threshold = _fmt(p.threshold)
        if p.spike.unbounded_above is not None and p.threshold is None:
            threshold = f"grows>{_fmt(p.spike.unbounded_above, 3)}"
        rows.append([_fmt(p.value), *hss, p.regime, threshold, wm, verdict, wavelength])
    widths = [max(len(c), *(len(r[i]) for r in rows)) for i, c in enumerate(cols)]
    lines = [*head, "  ".join(c.ljust(w) for c, w in zip(cols, widths)),
             "  ".join("-" * w for w in widths)]
    lines += ["  ".join(v.ljust(w) for v, w in zip(r, widths)) for r in rows]
    return "\n".join(lines) + "\n"
