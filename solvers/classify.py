"""Outcome of a finished PDE run, and features of a final pattern.

The verdict uses the final state, the run's cheap history (spatial mean, minimum, maximum and relative rate
of each recorded step) and the stepper's status; see `classify` for the rules and `Tolerances` for what each
word means. Everything here is plain numpy on small arrays: the history is resampled onto a uniform time grid
before any period is estimated, because adaptive steps are not uniform in time.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import scipy.fft as sfft
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from .records import Discretisation, History

__all__ = ["OUTCOMES", "STATUSES", "Outcome", "PatternFeatures", "Tolerances", "classify", "pattern_features"]

OUTCOMES = (
    "baseline",
    "other-uniform",
    "stationary-pattern",
    "oscillating-uniform",
    "dynamic-pattern",
    "diverged",
    "unsettled",
)
STATUSES = ("settled", "reached-end", "diverged", "failed")


@dataclass(frozen=True)
class Tolerances:
    """What the classifier means by uniform, same as the baseline, settled, oscillating and moving.

    Each species ``i`` is judged on its own scale ``s_i``: the largest ``|u_i|`` of the final state, or, for
    history signals, the largest ``|min|`` or ``|max|`` of that species in the window. Every relative
    threshold has an absolute floor for species that sit near zero.

    Attributes
    ----------
    uniform_rel, uniform_abs : a state is *uniform* when every species' spatial range
        ``max u_i - min u_i`` is at most ``uniform_rel * s_i + uniform_abs``.
    baseline_rel, baseline_abs : a uniform state is *the baseline* when every species satisfies
        ``max |u_i - b_i| <= baseline_rel * max(s_i, |b_i|) + baseline_abs``, ``b`` the baseline HSS.
    settled_rate, settled_window : a run the stepper did not mark settled still counts as *settled* when
        the history's relative rate ``||du/dt|| / ||u||`` (units 1/time) stays at or below ``settled_rate``
        over the trailing rows, at least ``min_samples`` of them spanning at least ``settled_window`` time
        units (the stepper's own settling rule, `solvers.settle.SettleRule`, has the same two numbers).
    min_samples : fewest history rows on which any verdict from the history is taken.
    window : the recent history examined for oscillation and motion: the last ``window`` fraction of the
        recorded time span.
    oscillation_rel, oscillation_abs : a history signal (spatial mean or spatial range of a species)
        *varies* when its peak-to-peak over the window exceeds ``oscillation_rel * s_i + oscillation_abs``.
    min_periods : a varying signal *oscillates* only if at least this many full cycles lie in the window
        (cycles run between upward crossings of the signal's mid-range, with a hysteresis band of a quarter
        of the half peak-to-peak, after removing the linear trend of the cycle means; so the window must
        span about ``min_periods + 1`` periods), and
    period_spread : the cycle lengths agree to this relative spread ``(max - min) / mean``, and
    amplitude_spread : the cycles' amplitudes (root-mean-square deviation from the cycle's mean, robust to
        noise) agree to this relative spread ``(max - min) / max`` (a decaying or growing oscillation is not
        periodic), and
    samples_per_period : the window holds at least this many history rows per cycle, so that no verdict
        rests on a few sampling intervals. A run oscillates when every varying signal (means, ranges and the
        values at the history's probe nodes) oscillates; its period is the longest of theirs (a standing wave
        keeps its mean and its range repeats twice per period; the value at a probe node shows the period).
    steady_rel : a history signal is *steady* (for the moving-pattern test) when its peak-to-peak over the
        window is at most ``steady_rel * s_i + oscillation_abs``.
    moving_rate, min_travel : a run whose means and ranges are steady and whose state stays non-uniform is a
        *moving pattern* when the rate stays at or above ``moving_rate`` in the whole window and its time
        integral over the window (the distance travelled, in units of the state's norm) is at least
        ``min_travel``, and
    max_step_travel : no history interval in the window travels more than this (``dt * rate``): the steps
        resolved the motion. An accurate step moves the state by much less than its norm; a stepper that
        takes huge steps while reporting a high rate has not resolved any motion, and no verdict is taken.
    bound : a state with ``|u| > bound`` anywhere counts as diverged.
    """

    uniform_rel: float = 1e-3
    uniform_abs: float = 1e-8
    baseline_rel: float = 1e-3
    baseline_abs: float = 1e-8
    settled_rate: float = 1e-6
    settled_window: float = 20.0
    min_samples: int = 8
    window: float = 0.5
    oscillation_rel: float = 1e-3
    oscillation_abs: float = 1e-8
    min_periods: float = 3.0
    period_spread: float = 0.1
    amplitude_spread: float = 0.1
    samples_per_period: float = 8.0
    steady_rel: float = 0.05
    moving_rate: float = 1e-4
    min_travel: float = 3.0
    max_step_travel: float = 0.25
    bound: float = np.inf

    def __post_init__(self) -> None:
        positive = (
            "uniform_rel", "baseline_rel", "oscillation_rel", "steady_rel", "settled_rate", "settled_window",
            "max_step_travel",
        )
        for name in positive:
            if not getattr(self, name) > 0:
                msg = f"`{name}` must be positive, got {getattr(self, name)!r}."
                raise ValueError(msg)
        if not 0 < self.window <= 1:
            msg = f"`window` must lie in (0, 1], got {self.window!r}."
            raise ValueError(msg)
        if self.min_periods < 1 or self.min_samples < 2:
            got = f"{self.min_periods!r}, {self.min_samples!r}"
            msg = f"`min_periods` must be >= 1 and `min_samples` >= 2, got {got}."
            raise ValueError(msg)

    @classmethod
    def from_solver(
        cls,
        rtol: float,
        atol: float,
        *,
        settle_tol: float = 1e-6,
        settle_window: float = 20.0,
        **overrides: float,
    ) -> Tolerances:
        """Thresholds that follow the solver's accuracy.

        Differences within ten times the solver's tolerance are numerical noise, so the relative thresholds
        (uniform, baseline, oscillation) are ``10 * rtol`` clipped to ``[1e-6, 1e-2]`` (never looser than
        1 %) and the absolute floors are ``10 * atol``. Settling follows the stepper's rule: the rate
        threshold is ``max(settle_tol, rtol / settle_window)`` (a drift below ``rtol`` over the whole window
        is not resolved by the error control) over ``settle_window`` time units; a pattern moves when its
        rate stays above ``100`` times that. ``overrides`` replace any field by name.
        """
        if not (rtol > 0 and atol >= 0 and settle_tol > 0 and settle_window > 0):
            got = f"{rtol!r}, {atol!r}, {settle_tol!r}, {settle_window!r}"
            msg = f"`rtol`, `settle_tol` and `settle_window` must be positive and `atol` >= 0, got {got}."
            raise ValueError(msg)
        rel = float(np.clip(10.0 * rtol, 1e-6, 1e-2))
        floor = 10.0 * float(atol)
        settled = max(float(settle_tol), float(rtol) / settle_window)
        base = cls(
            uniform_rel=rel,
            uniform_abs=floor,
            baseline_rel=rel,
            baseline_abs=floor,
            oscillation_rel=rel,
            oscillation_abs=floor,
            settled_rate=settled,
            settled_window=float(settle_window),
            moving_rate=100.0 * settled,
        )
        return replace(base, **overrides)


@dataclass(frozen=True)
class PatternFeatures:
    """Shape of one species' final pattern.

    Attributes
    ----------
    species : index of the species described.
    amplitude : ``max - min`` of that species.
    relative_range : ``amplitude / max |u|``.
    regions : number of high regions (connected sets of nodes above the midpoint ``(min + max) / 2``); in 1D
        the number of peaks or plateaus. A region touching a no-flux boundary counts as one region, like any
        other (it is half a peak of the mirror-extended pattern).
    areas : measure (sum of quadrature weights; a length in 1D) of each high region, largest first.
    area_fraction : total measure of the high regions over the domain's measure.
    location : ``"edge"`` (every high region touches the boundary), ``"interior"`` (none does), ``"both"``,
        or ``"none"`` (no region: the species is uniform).
    wavelength : 1D only: ``2 L / (2 n_interior + n_edge)``, the wavelength of the mirror-extended pattern
        (``2 pi / k`` for ``cos(k x)`` with admissible ``k = j pi / L``); None in 2D or with no region.
    spectral_wavelength : on uniform finite-volume grids, ``2 pi / |k|`` for the cosine mode ``k`` with the
        largest coefficient in the discrete cosine transform of the deviation from the mean; None otherwise.
    """

    species: int
    amplitude: float
    relative_range: float
    regions: int
    areas: tuple[float, ...]
    area_fraction: float
    location: str
    wavelength: float | None
    spectral_wavelength: float | None

    def to_dict(self) -> dict:
        """Plain ints, floats, strings, lists and None, for JSON."""
        return {
            "species": int(self.species),
            "amplitude": float(self.amplitude),
            "relative_range": float(self.relative_range),
            "regions": int(self.regions),
            "areas": [float(a) for a in self.areas],
            "area_fraction": float(self.area_fraction),
            "location": self.location,
            "wavelength": _float_or_none(self.wavelength),
            "spectral_wavelength": _float_or_none(self.spectral_wavelength),
        }


@dataclass(frozen=True)
class Outcome:
    """Verdict on one run.

    Attributes
    ----------
    outcome : one of `OUTCOMES`.
    reason : a short sentence saying why.
    features : features of the final state for the two pattern outcomes, None otherwise.
    period : period of the history for oscillating outcomes, None otherwise.
    """

    outcome: str
    reason: str
    features: PatternFeatures | None = None
    period: float | None = None

    def __post_init__(self) -> None:
        if self.outcome not in OUTCOMES:
            msg = f"`outcome` must be one of {', '.join(OUTCOMES)}, got {self.outcome!r}."
            raise ValueError(msg)

    def to_dict(self) -> dict:
        """Plain data for JSON."""
        return {
            "outcome": self.outcome,
            "reason": self.reason,
            "features": None if self.features is None else self.features.to_dict(),
            "period": _float_or_none(self.period),
        }


def _float_or_none(value: float | None) -> float | None:
    """``float(value)``, keeping None."""
    return None if value is None else float(value)


# ---------------------------------------------------------------------------------------------------------
# classification


def classify(
    disc: Discretisation,
    u_final: np.ndarray,
    history: History,
    baseline: np.ndarray,
    status: str,
    tol: Tolerances | None = None,
) -> Outcome:
    """Classify a finished run into one of `OUTCOMES`.

    Rules, in order: the stepper's ``"diverged"``, a non-finite state or one beyond ``tol.bound`` ->
    ``diverged``; a ``"failed"`` run -> ``unsettled``. A settled run (the stepper says so, or the history's
    rate has stayed below ``tol.settled_rate``) is ``baseline`` or ``other-uniform`` when uniform, and
    ``stationary-pattern`` when not. Otherwise the recent history decides: every varying mean or range
    periodic over at least ``tol.min_periods`` consistent cycles -> ``oscillating-uniform`` when the spatial
    range stays uniform throughout the window, else ``dynamic-pattern``; a non-uniform state with steady
    means and ranges and a rate that stays high -> ``dynamic-pattern`` (a moving pattern). Anything else is
    ``unsettled``: the evidence is never stretched to a verdict.

    Parameters
    ----------
    disc : the discretisation the run used.
    u_final : ``(n, m)`` final state.
    history : the run's history, one row per recorded step.
    baseline : ``(n,)`` the homogeneous steady state the run started from.
    status : the stepper's status, one of `STATUSES`.
    tol : thresholds; ``Tolerances()`` if None.
    """
    tol = Tolerances() if tol is None else tol
    u, b = _check_inputs(disc, u_final, baseline, status)
    # step: divergence and failure
    if status == "diverged":
        return Outcome("diverged", "The stepper reported divergence.")
    if not np.all(np.isfinite(u)):
        return Outcome("diverged", "The final state has non-finite values.")
    if np.max(np.abs(u)) > tol.bound:
        return Outcome("diverged", f"The final state leaves the bound |u| <= {tol.bound:.3g}.")
    if status == "failed":
        return Outcome("unsettled", "The stepper failed before the end; no verdict.")
    # step: settled runs
    uniform, worst = _uniform(u, tol)
    settled = status == "settled" or _settled_history(history, tol)
    how = "the stepper reported it settled" if status == "settled" else "the history's rate stayed low"
    if settled:
        if not uniform:
            return Outcome(
                "stationary-pattern",
                f"Settled ({how}) with species {worst} non-uniform.",
                features=pattern_features(disc, u),
            )
        dist, i = _baseline_distance(u, b, tol)
        if dist <= 1.0:
            return Outcome("baseline", f"Settled ({how}), uniform and at the baseline.")
        return Outcome(
            "other-uniform",
            f"Settled ({how}), uniform, {dist:.3g} tolerances from the baseline in species {i}.",
        )
    return _classify_dynamics(disc, u, history, tol)


def _check_inputs(
    disc: Discretisation, u_final: np.ndarray, baseline: np.ndarray, status: str
) -> tuple[np.ndarray, np.ndarray]:
    """Validate shapes and the status; return float arrays."""
    if status not in STATUSES:
        msg = f"`status` must be one of {', '.join(STATUSES)}, got {status!r}."
        raise ValueError(msg)
    u = np.asarray(u_final, dtype=float)
    if u.ndim != 2 or u.shape[1] != disc.m:
        msg = f"`u_final` must have shape (n, {disc.m}), got {u.shape}."
        raise ValueError(msg)
    b = np.asarray(baseline, dtype=float)
    if b.shape != (u.shape[0],):
        msg = f"`baseline` must have shape ({u.shape[0]},), got {b.shape}."
        raise ValueError(msg)
    return u, b


def _uniform(u: np.ndarray, tol: Tolerances) -> tuple[bool, int]:
    """Whether every species' spatial range is within the uniform tolerance; and the worst species."""
    excess = _ratio(np.ptp(u, axis=1), tol.uniform_rel * np.max(np.abs(u), axis=1) + tol.uniform_abs)
    worst = int(np.argmax(excess))
    return bool(excess[worst] <= 1.0), worst


def _baseline_distance(u: np.ndarray, b: np.ndarray, tol: Tolerances) -> tuple[float, int]:
    """Largest distance to the baseline in units of the baseline tolerance, and the species where it is."""
    scale = np.maximum(np.max(np.abs(u), axis=1), np.abs(b))
    ratio = _ratio(np.max(np.abs(u - b[:, None]), axis=1), tol.baseline_rel * scale + tol.baseline_abs)
    i = int(np.argmax(ratio))
    return float(ratio[i]), i


def _ratio(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a / b`` for ``a, b >= 0``, with ``0 / 0 = 0`` and ``a / 0 = inf``."""
    out = np.where(a > 0, np.inf, 0.0)
    return np.divide(a, b, out=out, where=b > 0)


def _settled_history(history: History, tol: Tolerances) -> bool:
    """Whether the trailing history rows keep the rate at or below ``tol.settled_rate`` long enough."""
    t = np.asarray(history.t, dtype=float)
    rate = np.asarray(history.rate, dtype=float)
    if t.size < tol.min_samples:
        return False
    high = np.flatnonzero(~(rate <= tol.settled_rate))
    first = 0 if high.size == 0 else int(high[-1]) + 1
    rows = t.size - first
    return rows >= tol.min_samples and t[-1] - t[min(first, t.size - 1)] >= tol.settled_window


def _classify_dynamics(disc: Discretisation, u: np.ndarray, history: History, tol: Tolerances) -> Outcome:
    """Verdict on a run that did not settle, from its recent history."""
    t, mean, lo, hi, rate, probe = _window(history, tol.window)
    if t.size < tol.min_samples:
        return Outcome("unsettled", f"Not settled, and only {t.size} history rows in the window; no verdict.")
    if mean.shape[1] != u.shape[0]:
        msg = f"`history.mean` must have {u.shape[0]} columns (one per species), got {mean.shape[1]}."
        raise ValueError(msg)
    if not all(np.all(np.isfinite(a)) for a in (mean, lo, hi, rate, probe)):
        return Outcome("diverged", "The history has non-finite values.")
    spread = hi - lo
    scale = np.maximum(np.max(np.abs(lo), axis=0), np.max(np.abs(hi), axis=0))
    uniform_band = tol.uniform_rel * scale + tol.uniform_abs
    # step: oscillation of every varying signal (ranges inside the uniform band are noise)
    periods, notes = [], []
    for i in range(mean.shape[1]):
        threshold = tol.oscillation_rel * scale[i] + tol.oscillation_abs
        signals = [("mean", mean[:, i]), ("range", spread[:, i])]
        signals += [(f"value at probe node {j}", probe[:, i, j]) for j in range(probe.shape[2])]
        for what, x in signals:
            if np.ptp(x) <= threshold or (what == "range" and x.max() <= uniform_band[i]):
                continue
            period, note = _periodicity(t, x, tol)
            if period is None:
                notes.append(f"the {what} of species {i} {note}")
            else:
                periods.append((period, f"the {what} of species {i}"))
    if periods and not notes:
        period, name = max(periods)
        cycles = (t[-1] - t[0]) / period
        if np.all(spread <= uniform_band):
            return Outcome(
                "oscillating-uniform",
                f"Uniform throughout the window; {name} repeats with period {period:.4g} "
                f"({cycles:.1f} cycles).",
                period=period,
            )
        return Outcome(
            "dynamic-pattern",
            f"Non-uniform; {name} repeats with period {period:.4g} ({cycles:.1f} cycles).",
            features=pattern_features(disc, u),
            period=period,
        )
    # step: a moving pattern (steady means and ranges, non-uniform throughout, rate high)
    steady_band = tol.steady_rel * scale + tol.oscillation_abs
    steady = bool(np.all(np.ptp(mean, axis=0) <= steady_band))
    steady = steady and bool(np.all(np.ptp(spread, axis=0) <= steady_band))
    patterned = bool(np.all(np.any(spread > uniform_band, axis=1)))
    steps = 0.5 * (rate[1:] + rate[:-1]) * np.diff(t)
    travel = float(steps.sum())
    resolved = bool(steps.max() <= tol.max_step_travel)
    if steady and patterned and resolved and rate.min() >= tol.moving_rate and travel >= tol.min_travel:
        return Outcome(
            "dynamic-pattern",
            f"Non-uniform with steady means and ranges while the rate stays >= {rate.min():.3g}: "
            f"a moving pattern (travelled {travel:.3g} norms in the window).",
            features=pattern_features(disc, u),
        )
    detail = "; ".join(notes) if notes else _still_changing(steady, patterned, rate, steps, tol)
    return Outcome("unsettled", f"Not settled (last rate {rate[-1]:.3g}) and no verdict: {detail}.")


def _still_changing(
    steady: bool, patterned: bool, rate: np.ndarray, steps: np.ndarray, tol: Tolerances
) -> str:
    """Why a run with no oscillating signal is not a moving pattern either."""
    if not steady:
        return "the means or ranges drift"
    if not patterned:
        return "the state is uniform, or not non-uniform throughout the window"
    if rate.min() < tol.moving_rate:
        return f"the rate drops to {rate.min():.3g}, below the moving threshold {tol.moving_rate:.3g}"
    if steps.max() > tol.max_step_travel:
        return f"one history step covers {steps.max():.3g} norms, too long to resolve any motion"
    return f"it travelled only {steps.sum():.3g} norms in the window, {tol.min_travel:.3g} needed"


def _window(history: History, fraction: float) -> tuple[np.ndarray, ...]:
    """Rows of the last ``fraction`` of the recorded time span, repeated times dropped.

    Returns times ``(k,)``, means, minima and maxima ``(k, n)``, rates ``(k,)`` and probe values ``(k, n, p)``
    (``p = 0`` for a history without probes).
    """
    t = np.asarray(history.t, dtype=float)
    rows = np.flatnonzero(t >= t[-1] - fraction * (t[-1] - t[0])) if t.size else np.zeros(0, dtype=int)
    rows = rows[np.concatenate([[True], np.diff(t[rows]) > 0])] if rows.size else rows
    probe = history.probe
    if probe is None:
        probe = np.zeros((t.size, np.shape(history.mean)[-1], 0))
    fields = (history.t, history.mean, history.lo, history.hi, history.rate, probe)
    return tuple(np.asarray(a, dtype=float)[rows] for a in fields)


# ---------------------------------------------------------------------------------------------------------
# period estimation


def _periodicity(t: np.ndarray, x: np.ndarray, tol: Tolerances) -> tuple[float | None, str]:
    """Period of a signal sampled at increasing times ``t``, or None with what is missing.

    The signal is resampled onto a uniform grid, its cycles are cut at upward mid-range crossings
    (`_up_crossings`), the linear trend of the cycle means is removed and the cycles are cut again; the
    period is the mean cycle length, accepted only under the rules of `Tolerances`.
    """
    grid = np.linspace(t[0], t[-1], int(np.clip(4 * t.size, 256, 16384)))
    y = np.interp(grid, t, x)
    cuts = _up_crossings(grid, y)
    if cuts.size >= 4:
        means = [np.mean(y[(grid >= a) & (grid < b)]) for a, b in zip(cuts[:-1], cuts[1:])]
        y = y - np.polyfit(0.5 * (cuts[:-1] + cuts[1:]), means, 1)[0] * (grid - grid[0])
        cuts = _up_crossings(grid, y)
    cycles = cuts.size - 1
    if cycles < 1:
        return None, "drifts without a full cycle in the window"
    if cycles < tol.min_periods:
        return None, f"varies with {cycles} full cycles in the window ({tol.min_periods:g} needed)"
    lengths = np.diff(cuts)
    period = float((cuts[-1] - cuts[0]) / cycles)
    rows_per_cycle = t.size * period / (t[-1] - t[0])
    if rows_per_cycle < tol.samples_per_period:
        need = f"{tol.samples_per_period:g} needed"
        return None, f"varies with only {rows_per_cycle:.1f} history rows per cycle ({need})"
    if np.ptp(lengths) > tol.period_spread * period:
        return None, f"varies with cycle lengths that differ by {np.ptp(lengths) / period:.0%}"
    heights = np.array([np.std(y[(grid >= a) & (grid < b)]) for a, b in zip(cuts[:-1], cuts[1:])])
    if np.ptp(heights) > tol.amplitude_spread * heights.max():
        return None, f"varies with cycle amplitudes that differ by {np.ptp(heights) / heights.max():.0%}"
    return period, "repeats"


def _up_crossings(grid: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Times where ``y`` rises through its mid-range, with hysteresis.

    A rise counts once the signal has been below ``mid - band`` and then gets above ``mid + band``,
    ``band`` a quarter of the half peak-to-peak; its time is the last linear crossing of ``mid`` in between.
    """
    mid = 0.5 * (y.max() + y.min())
    band = 0.125 * (y.max() - y.min())
    if band <= 0:
        return np.zeros(0)
    side = np.where(y > mid + band, 1, np.where(y < mid - band, -1, 0))
    marked = np.flatnonzero(side)
    rises = np.flatnonzero((side[marked[:-1]] == -1) & (side[marked[1:]] == 1))
    times = np.empty(rises.size)
    for k, r in enumerate(rises):
        lo, hi = marked[r], marked[r + 1]
        seg = y[lo : hi + 1] - mid
        j = lo + int(np.flatnonzero((seg[:-1] <= 0) & (seg[1:] > 0))[-1])
        frac = (mid - y[j]) / (y[j + 1] - y[j])
        times[k] = grid[j] + frac * (grid[j + 1] - grid[j])
    return times


# ---------------------------------------------------------------------------------------------------------
# pattern features


def pattern_features(disc: Discretisation, u: np.ndarray, species: int | None = None) -> PatternFeatures:
    """Features of one species of the state ``u (n, m)``: by default the one with the largest relative range.

    The relative range of species ``i`` is ``(max u_i - min u_i) / max |u_i|``. High regions are the
    connected sets of nodes above the midpoint between the species' minimum and maximum, connected along the
    grid in 1D and on finite-volume rectangles, and along the stiffness matrix's sparsity pattern (the mesh's
    node graph) otherwise.
    """
    u = np.atleast_2d(np.asarray(u, dtype=float))
    if u.shape[1] != disc.m:
        msg = f"`u` must have shape (n, {disc.m}), got {u.shape}."
        raise ValueError(msg)
    amplitude = np.ptp(u, axis=1)
    size = np.max(np.abs(u), axis=1)
    relative = np.divide(amplitude, size, out=np.zeros_like(amplitude), where=size > 0)
    if species is None:
        species = int(np.argmax(relative))
    elif not 0 <= species < u.shape[0]:
        msg = f"`species` must be an index in [0, {u.shape[0]}), got {species!r}."
        raise ValueError(msg)
    v = u[species]
    weights = np.asarray(disc.weights, dtype=float)
    high = v > 0.5 * (v.min() + v.max())
    if not high.any():
        return PatternFeatures(species, 0.0, 0.0, 0, (), 0.0, "none", None, None)
    # step: high regions and where they sit
    labels = _components(_adjacency(disc), high)
    count = int(labels.max()) + 1
    areas = np.bincount(labels[high], weights=weights[high], minlength=count)
    edge = np.bincount(labels[high], weights=_boundary_nodes(disc)[high].astype(float), minlength=count) > 0
    location = "edge" if edge.all() else "interior" if not edge.any() else "both"
    wavelength = None
    if disc.dim == 1:
        wavelength = 2.0 * disc.size[0] / (2 * int((~edge).sum()) + int(edge.sum()))
    return PatternFeatures(
        species=species,
        amplitude=float(amplitude[species]),
        relative_range=float(relative[species]),
        regions=count,
        areas=tuple(float(a) for a in np.sort(areas)[::-1]),
        area_fraction=float(areas.sum() / weights.sum()),
        location=location,
        wavelength=wavelength,
        spectral_wavelength=_spectral_wavelength(disc, v),
    )


def _adjacency(disc: Discretisation) -> sp.csr_matrix:
    """Node graph: neighbours along the line in 1D, on the grid for FV rectangles, else ``K``'s sparsity."""
    m = disc.m
    if disc.dim == 1:
        order = np.argsort(disc.coords[:, 0], kind="stable")
        a, b = order[:-1], order[1:]
    elif disc.method == "fv" and disc.grid is not None and len(disc.grid) == 2:
        idx = np.arange(m).reshape(disc.grid)
        a = np.concatenate([idx[:-1, :].ravel(), idx[:, :-1].ravel()])
        b = np.concatenate([idx[1:, :].ravel(), idx[:, 1:].ravel()])
    else:
        k = sp.coo_matrix(disc.stiffness)
        a, b = k.row, k.col
    return sp.csr_matrix((np.ones(a.size), (a, b)), shape=(m, m))


def _components(adjacency: sp.csr_matrix, mask: np.ndarray) -> np.ndarray:
    """Labels ``0..r-1`` of the connected components of the masked nodes, ``-1`` elsewhere."""
    nodes = np.flatnonzero(mask)
    _, sub = connected_components(adjacency[nodes][:, nodes], directed=False)
    labels = np.full(mask.size, -1)
    labels[nodes] = sub
    return labels


def _boundary_nodes(disc: Discretisation) -> np.ndarray:
    """``(m,)`` bool: nodes (or cells) on the domain's boundary, found from the coordinates.

    Interval and rectangle: the extreme coordinates along each axis (the first and last cells of a
    finite-volume grid). Disk: nodes at the largest distance from the bounding box's centre, to ``1e-6 R``.
    """
    x = np.asarray(disc.coords, dtype=float)
    lo, hi = x.min(axis=0), x.max(axis=0)
    if disc.shape == "disk":
        r = np.linalg.norm(x - 0.5 * (lo + hi), axis=1)
        return r >= r.max() * (1 - 1e-6)
    slack = 1e-9 * np.maximum(hi - lo, np.finfo(float).tiny)
    return np.any((x <= lo + slack) | (x >= hi - slack), axis=1)


def _spectral_wavelength(disc: Discretisation, v: np.ndarray) -> float | None:
    """Wavelength of the dominant cosine mode on a uniform finite-volume grid, None elsewhere.

    On cell centres ``x_j = (j + 1/2) L / N`` the DCT-II basis is exactly ``cos(k pi x_j / L)``.
    """
    if disc.method != "fv" or disc.grid is None or disc.shape not in ("interval", "rectangle"):
        return None
    c = np.abs(sfft.dctn((v - v.mean()).reshape(disc.grid), type=2))
    c.flat[0] = 0.0
    ks = np.unravel_index(int(np.argmax(c)), c.shape)
    wavenumber = np.pi * np.sqrt(sum((k / length) ** 2 for k, length in zip(ks, disc.size)))
    return float(2 * np.pi / wavenumber) if wavenumber > 0 else None
