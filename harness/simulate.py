"""One full-PDE run of a case at one parameter point: discretise, start, integrate, classify.

This is the pure task behind `rdcheck simulate` and every run of a validation: plain inputs in, a
:class:`Simulation` out. Numerical failure is an outcome (`diverged`, `unsettled`), never an exception.
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .case import Case
from .equilibria import baseline_hss
from .errors import InputError
from .model import Model

__all__ = ["Simulation", "Start", "mass_drift", "parse_start", "simulate"]

START_KINDS = ("pulse", "noise")


@dataclass(frozen=True)
class Start:
    """How a run starts from the baseline HSS: a pulse of signed height, or noise of an amplitude."""

    kind: str
    value: float

    def __post_init__(self) -> None:
        if self.kind not in START_KINDS:
            msg = f"`kind` must be one of {', '.join(START_KINDS)}, got {self.kind!r}"
            raise ValueError(msg)

    def label(self) -> str:
        """``pulse:H`` / ``noise:A``, as on the command line."""
        return f"{self.kind}:{self.value:g}"


def parse_start(text: str) -> Start:
    """Read ``pulse:HEIGHT`` or ``noise:AMPLITUDE`` (the `--start` option)."""
    kind, sep, value = text.partition(":")
    try:
        number = float(value)
    except ValueError:
        number = float("nan")
    if not sep or kind not in START_KINDS or not np.isfinite(number) or (kind == "noise" and number <= 0):
        msg = f"`--start`: expected pulse:HEIGHT or noise:AMPLITUDE (amplitude > 0), got {text!r}"
        raise InputError(msg)
    return Start(kind, number)


@dataclass(frozen=True)
class Simulation:
    """What one run produced, with what it was run on."""

    params: dict[str, float]
    start: Start
    dim: int
    shape: str
    size: tuple[float, ...]
    resolution: int
    method: str
    hss: np.ndarray
    outcome: object  # solvers.classify.Outcome
    run: object  # solvers.stepping.RunResult
    coords: np.ndarray
    mass_drift: float | None
    wall: float
    polish: dict | None = None
    stable: bool | None = None

    def to_json(self, species: Sequence[str]) -> dict:
        """The `simulate --json` object: `outcome`, `t_final`, `mass_drift`, and more."""
        o = self.outcome
        return {
            "outcome": o.outcome,
            "t_final": float(self.run.t_final),
            "mass_drift": self.mass_drift,
            "reason": o.reason,
            "period": o.period,
            "features": None if o.features is None else o.features.to_dict(),
            "status": self.run.status,
            "message": self.run.message,
            "start": self.start.label(),
            "dim": self.dim,
            "domain": {"shape": self.shape, "size": list(self.size)},
            "resolution": self.resolution,
            "nodes": int(self.coords.shape[0]),
            "method": self.method,
            "hss": {s: float(v) for s, v in zip(species, self.hss)},
            "params": dict(self.params),
            "steps": int(self.run.nsteps),
            "rejected": int(self.run.nrejected),
            "wall_seconds": self.wall,
            "polish": self.polish,
            "stable": self.stable,
        }


def mass_drift(conservation: np.ndarray, weights: np.ndarray, u0: np.ndarray, u: np.ndarray) -> float | None:
    """Largest relative drift of a conserved total ``sum_i w_i * weights @ u_i`` over a run; None if none."""
    w = np.asarray(conservation, dtype=float)
    if w.size == 0 or not np.all(np.isfinite(u)):
        return None if w.size == 0 else float("inf")
    t0 = w @ (u0 @ weights)
    t1 = w @ (u @ weights)
    scale = np.maximum(np.abs(t0), np.abs(w) @ (np.abs(u0) @ weights))
    return float(np.max(np.abs(t1 - t0) / np.where(scale > 0, scale, 1.0)))


def _discretisation(case: Case, dim: int, resolution: int | None):
    from solvers.fem import make_discretisation

    domain = case.domain.for_dim(dim)
    cells = resolution or (case.solver.cells_1d if dim == 1 else case.solver.cells_2d)
    method = "p1" if domain.shape == "disk" else case.solver.method
    return make_discretisation(domain.shape, domain.size, cells, method=method), domain, cells, method


def _initial_state(case: Case, model: Model, disc, hss: np.ndarray, start: Start) -> np.ndarray:
    from solvers.starts import noise_state, pulse_state

    try:
        if start.kind == "noise":
            seed = case.noise.seed if case.noise is not None else 1
            return noise_state(disc, hss, start.value, seed)
        pulse = case.pulse
        if pulse is None:
            msg = f"{case.path}: `starts.pulse`: missing (needed for a pulse start)"
            raise InputError(msg)
        idx = [model.species.index(s) for s in pulse.species]
        compensate = model.conservation if pulse.compensate and len(model.conservation) else None
        return pulse_state(disc, hss, idx, start.value, pulse.width, pulse.where, compensate=compensate)
    except ValueError as exc:
        msg = f"{case.path}: `--start {start.label()}`: {exc}"
        raise InputError(msg) from None


def find_baseline(case: Case, model: Model, params: Mapping[str, float]) -> np.ndarray:
    """The baseline HSS at ``params`` (nearest the case's guess), or an InputError naming the guess."""
    kin = model.kinetics(params)
    guess = np.array([case.guess[s] for s in model.species])
    eq = baseline_hss(kin, guess)
    if eq is None:
        msg = f"{case.path}: `baseline.guess`: no homogeneous steady state found near it at {dict(params)}"
        raise InputError(msg)
    return eq.state


def simulate(case: Case, model: Model, params: Mapping[str, float], start: Start, *, dim: int = 1,
             resolution: int | None = None, observers: Sequence[object] = (), hss: np.ndarray | None = None,
             ) -> Simulation:
    """Run the full PDE from the baseline HSS plus ``start`` and classify the outcome."""
    from solvers.classify import Tolerances, classify
    from solvers.settle import SettleRule
    from solvers.stepping import integrate

    t0 = time.perf_counter()
    kin = model.kinetics(params)
    hss = find_baseline(case, model, params) if hss is None else np.asarray(hss, dtype=float)
    disc, domain, cells, method = _discretisation(case, dim, resolution)
    u0 = _initial_state(case, model, disc, hss, start)
    sol = case.solver
    settle = SettleRule(tol=sol.settle_tol, window=sol.settle_window)
    run = integrate(disc, kin.diffusion, kin.reaction, kin.jacobian, u0, sol.t_end, rtol=sol.rtol, atol=sol.atol,
                    settle=settle, snapshots=sol.snapshots, observers=observers)
    tol = Tolerances.from_solver(sol.rtol, sol.atol, settle_tol=sol.settle_tol, settle_window=sol.settle_window)
    outcome = classify(disc, run.u, run.history, hss, run.status, tol)
    drift = mass_drift(model.conservation, disc.weights, u0, run.u)
    settled = outcome.outcome in ("baseline", "other-uniform", "stationary-pattern")
    polished, stable = None, None
    if sol.polish and settled:
        polished = _polish(disc, kin, model, u0, run.u)
    if sol.stability and settled and disc.lumped:
        stable = _stable(disc, kin, model, run.u)
    return Simulation(params=dict(params), start=start, dim=dim, shape=domain.shape, size=domain.size,
                      resolution=cells, method=method, hss=hss, outcome=outcome, run=run, coords=disc.coords,
                      mass_drift=drift, wall=time.perf_counter() - t0, polish=polished, stable=stable)


def _polish(disc, kin, model: Model, u0: np.ndarray, u: np.ndarray) -> dict:
    """Newton on the discrete steady equations (conserved totals of the start held); a summary for JSON."""
    from solvers.settle import polish

    rows = model.conservation if len(model.conservation) else None
    totals = None if rows is None else rows @ (u0 @ disc.weights)
    res = polish(disc, kin.diffusion, kin.reaction, kin.jacobian, u, rows, totals)
    change = float(np.max(np.abs(res.u - u)) / max(float(np.max(np.abs(u))), 1e-300))
    return {"success": bool(res.success), "residual": float(res.residual), "iterations": int(res.iterations),
            "relative_change": change if res.success else None, "message": res.message}


def _stable(disc, kin, model: Model, u: np.ndarray) -> bool:
    """Stability of a settled final state: rightmost eigenvalues of the sparse Jacobian (shift-invert Arnoldi),
    the conserved zero modes removed."""
    from solvers.stability import is_stable
    from solvers.system import MolSystem

    jac = MolSystem(disc, kin.diffusion, kin.reaction, kin.jacobian).jac(0.0, u.ravel())
    conserved = None
    if len(model.conservation):
        conserved = np.stack([np.kron(w, disc.weights) for w in model.conservation], axis=1)
    return bool(is_stable(jac, conserved=conserved, margin=1e-8))


class ProgressBar:
    """A tqdm bar over simulated time on stderr; it appears only for runs longer than a couple of seconds."""

    def __init__(self, label: str = "run", delay: float = 2.0) -> None:
        self.label, self.delay, self.bar, self.t = label, delay, None, 0.0

    def initialize(self, state, info) -> None:
        from tqdm import tqdm

        self.bar = tqdm(total=float(info["t_end"]), desc=self.label, unit="t", delay=self.delay, leave=False,
                        bar_format="{desc}: {percentage:3.0f}%|{bar}| t={n:.4g}/{total:.4g} [{elapsed}<{remaining}]")

    def handle(self, state, t: float) -> None:
        self.bar.update(float(t) - self.t)
        self.t = float(t)

    def finalize(self, info) -> None:
        self.bar.close()
