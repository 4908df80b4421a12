"""The unit of work of a validation: a picklable run task, its content key, and the record it produces.

Workers take a :class:`RunTask`, rebuild the case and model themselves (compiled functions are not
picklable, and are cached per process), run it with :func:`run_task`, and return a :class:`RunRecord`.
Only the driver writes records to the store.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, field
from functools import lru_cache

import numpy as np

__all__ = ["INCONCLUSIVE", "PATTERNED", "RunRecord", "RunTask", "WallClock", "run_key", "run_task", "verdict"]

#: Outcomes that count as "patterned" when judging a start.
PATTERNED = ("stationary-pattern", "dynamic-pattern")

#: Outcomes that say nothing about whether a start patterns.
INCONCLUSIVE = ("unsettled", "diverged")

#: History rows kept per record (thinned evenly, first and last kept).
HISTORY_ROWS = 400


def verdict(outcome: str) -> bool | None:
    """Whether a run with this outcome patterned; None when the outcome gives no verdict."""
    return None if outcome in INCONCLUSIVE else outcome in PATTERNED


@dataclass(frozen=True)
class RunTask:
    """One full-PDE run: which case (file + overrides), which point, which start, which grid.

    ``purpose`` says why the plan asked for it (``noise``, ``pulse``, ``threshold``, ``boundary``,
    ``refine``); it is not part of the key, so a run asked for twice is run once. ``hss`` is the baseline
    HSS the run starts from (the branch the prediction followed); None means the one nearest the guess.
    """

    case_path: str
    overrides: tuple[str, ...]
    params: tuple[tuple[str, float], ...]
    start_kind: str
    start_value: float
    dim: int
    resolution: int
    purpose: str = "pulse"
    hss: tuple[float, ...] | None = None

    @property
    def param_dict(self) -> dict[str, float]:
        """Parameters as a dict."""
        return dict(self.params)

    def to_dict(self) -> dict:
        """JSON-ready form."""
        d = asdict(self)
        d["overrides"] = list(self.overrides)
        d["params"] = dict(self.params)
        d["hss"] = None if self.hss is None else list(self.hss)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> RunTask:
        """Inverse of :meth:`to_dict`."""
        hss = d.get("hss")
        return cls(d["case_path"], tuple(d["overrides"]), tuple(sorted(d["params"].items())), d["start_kind"],
                   float(d["start_value"]), int(d["dim"]), int(d["resolution"]), d.get("purpose", "pulse"),
                   None if hss is None else tuple(float(v) for v in hss))


@dataclass(frozen=True)
class RunRecord:
    """What the store keeps of one run (a summary, the final state and a thinned history)."""

    key: str
    task: RunTask
    outcome: str
    reason: str
    t_final: float
    mass_drift: float | None
    status: str
    steps: int
    wall: float
    features: dict | None = None
    period: float | None = None
    error: str | None = None
    coords: np.ndarray = field(default_factory=lambda: np.zeros((0, 1)))
    final: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    history: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def patterned(self) -> bool:
        """Whether this run ended in a pattern."""
        return self.outcome in PATTERNED

    def summary(self) -> dict:
        """JSON-ready summary without the arrays."""
        return {
            "key": self.key, "task": self.task.to_dict(), "outcome": self.outcome, "reason": self.reason,
            "t_final": self.t_final, "mass_drift": self.mass_drift, "status": self.status, "steps": self.steps,
            "wall": self.wall, "features": self.features, "period": self.period, "error": self.error,
        }


def run_key(case, model, task: RunTask) -> str:
    """Content hash of everything that determines a run's result (not its purpose, not the file's path)."""
    from . import __version__

    content = {
        "model": model.fingerprint,
        "params": {k: float(v) for k, v in sorted(task.params)},
        "guess": {k: float(v) for k, v in sorted(case.guess.items())},
        "start": [task.start_kind, float(task.start_value)],
        "hss": None if task.hss is None else [float(f"{v:.12g}") for v in task.hss],
        "pulse": None if case.pulse is None else asdict(case.pulse),
        "noise": None if case.noise is None else asdict(case.noise),
        "domain": asdict(case.domain.for_dim(task.dim)),
        "dim": task.dim,
        "resolution": task.resolution,
        "solver": asdict(case.solver),
        "version": __version__,
    }
    text = json.dumps(content, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:24]


@lru_cache(maxsize=8)
def _load(case_path: str, overrides: tuple[str, ...]):
    """Case and compiled model, cached per worker process."""
    from .case import load_case
    from .model import build_model

    case = load_case(case_path, overrides)
    return case, build_model(case)


def _thin(history, rows: int = HISTORY_ROWS) -> dict[str, np.ndarray]:
    k = len(history.t)
    idx = np.unique(np.linspace(0, k - 1, min(rows, k)).round().astype(int)) if k else np.zeros(0, dtype=int)
    return {name: np.asarray(getattr(history, name))[idx] for name in ("t", "mean", "lo", "hi", "rate")}


class WallClock:
    """Observer that stops a run after ``limit`` seconds of wall time (the run is then `unsettled`)."""

    def __init__(self, limit: float) -> None:
        self.limit, self.t0 = float(limit), 0.0

    def initialize(self, state, info) -> None:
        import time

        self.t0 = time.perf_counter()

    def handle(self, state, t: float) -> None:
        import time

        from solvers.stepping import StopRun

        if time.perf_counter() - self.t0 > self.limit:
            msg = f"wall-time limit of {self.limit:g} s"
            raise StopRun(msg)

    def finalize(self, info) -> None:
        """Nothing to close."""


def run_task(task: RunTask, wall_limit: float | None = None) -> RunRecord:
    """Run one task in this process. Numerical failure is an outcome; bad input raises InputError.

    With ``wall_limit`` (seconds) a run still going after that long is stopped and classified from what it
    reached, which without a verdict is `unsettled` (never guessed).
    """
    from .errors import InputError
    from .simulate import Start, simulate

    case, model = _load(task.case_path, task.overrides)
    key = run_key(case, model, task)
    observers = () if wall_limit is None else (WallClock(wall_limit),)
    try:
        sim = simulate(case, model, task.param_dict, Start(task.start_kind, task.start_value), dim=task.dim,
                       resolution=task.resolution, observers=observers, hss=task.hss)
    except InputError as exc:
        if "`--start" not in str(exc):
            raise
        return RunRecord(key=key, task=task, outcome="unsettled", reason="the start is not admissible",
                         t_final=0.0, mass_drift=None, status="failed", steps=0, wall=0.0,
                         error=f"start not admissible: {exc}")
    o = sim.outcome
    return RunRecord(
        key=key, task=task, outcome=o.outcome, reason=o.reason, t_final=float(sim.run.t_final),
        mass_drift=sim.mass_drift, status=sim.run.status, steps=int(sim.run.nsteps), wall=sim.wall,
        features=None if o.features is None else o.features.to_dict(), period=o.period,
        coords=np.asarray(sim.coords, dtype=float), final=np.asarray(sim.run.u, dtype=float),
        history=_thin(sim.run.history),
    )
