"""Spike-limit (local perturbation) analysis of one homogeneous steady state.

In the limit ``D_slow -> 0``, ``D_fast -> infinity`` the PDE reduces to the well-mixed globals
``du/dt = f(u)`` plus a local copy ``s`` of the slow species, ``ds/dt = f_slow(s, u_fast)``, that sees the
global fast species and never feeds back. At an HSS ``u*`` the local dynamics are the ODE
``ds/dt = f_slow(s, u_fast*)``; its steady states are the *local states* (the HSS's own slow values among
them), and a pulse of height ``h`` puts ``s = s* + sign * h * e`` with ``e`` one on every pulsed slow
species. A pulse on a fast species spreads at once in this limit and has no effect, so fast entries of the
pulse are left out of ``e``.

Thresholds come two ways. Route 1 (boundary): the distance along ``sign * e`` to an unstable local state
on the ray (one slow species: the nearest root beyond ``s*``, the basin's edge). Route 2 (ODE): bisection
(multisection) on ``h`` with runs of the local ODE (LSODA, analytic Jacobian, ``rtol`` 1e-10), each run
classified as returned (entered a small ball around ``s*``), reached another stable local state, grew
without bound (left the local box, the region of interest), oscillates (its maxima settle on a stable
cycle) or unsettled. Where route 1 applies, route 2 checks ``h1 (1 -+ 1e-8)`` first, so both agree to
1e-8; else it scans heights up to the box's edge and bisects to 1e-8 (1e-5 for the sign not asked for).

Regimes (names of the design, ``REGIMES``), judged on pulses of the requested sign:
spike-stable HSS and no pulse leaves its basin -> "no-pattern"; a pulse above the threshold reaches a
stable local state or a local oscillation -> "pulse-triggered"; it only grows without bound ->
"no-pattern" with ``unbounded_above`` (never a pattern); spike-unstable HSS whose unstable mode, on either
side, settles on a stable local state -> "self-patterning", on an oscillation -> "self-oscillating";
anything else (growth without bound of a spike-unstable HSS, runs that do not settle, no HSS) ->
"unresolved", with the reason. ``well_mixed_stable`` is carried as it is: where it is False the whole
system leaves the HSS, and the regime still describes the reduced system near it.

Not handled: a conservation law among slow species only (the local block then has a structural zero
eigenvalue and the HSS counts as spike-unstable), and local roots where ``f_slow`` does not change sign.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from .equilibria import Equilibrium, all_roots, sobol
from .kinetics import Kinetics

__all__ = [
    "REGIMES",
    "LocalState",
    "SpikePrediction",
    "default_local_box",
    "local_eigenvalues",
    "local_states",
    "spike_analysis",
]

REGIMES = ("no-pattern", "pulse-triggered", "self-patterning", "self-oscillating", "unresolved")


@dataclass(frozen=True)
class LocalState:
    """A steady state of the local dynamics at fixed global fast species.

    Attributes
    ----------
    values : ``(n_slow,)`` local slow concentrations.
    eigenvalues : eigenvalues of the slow-slow block of the Jacobian there.
    stable : every eigenvalue has a negative real part.
    is_hss : this is the HSS's own slow values.
    """

    values: np.ndarray
    eigenvalues: np.ndarray
    stable: bool
    is_hss: bool = False


@dataclass(frozen=True)
class SpikePrediction:
    """What the spike-limit analysis predicts at one HSS.

    Attributes
    ----------
    hss : the HSS analysed (None if it was lost).
    well_mixed_stable : the HSS is stable in the well-mixed system (None without an HSS).
    spike_stable : the local block ``J[slow, slow]`` at the HSS is stable (None without an HSS).
    spike_eigenvalues : eigenvalues of that block.
    local_states : all local states in the local box, sorted.
    regime : one of ``REGIMES``.
    reason : why this regime, in a sentence (always filled).
    sign : the pulse's sign, +1 or -1.
    threshold_up, threshold_down : least pulse height along ``+e`` / ``-e`` that leaves the HSS's basin
        in the local dynamics; None where every height up to the edge of the local box returns.
    threshold : the one of the two for ``sign``, where a pulse beyond it patterns; None where what lies beyond
        is growth without bound (see ``unbounded_above``) or nothing.
    threshold_boundary : route 1, the distance along ``sign * e`` to an unstable local state on the ray
        (for one slow species, the nearest local root beyond the HSS), or None where that does not apply.
    threshold_ode : route 2, bisection on the height with trajectories of the local ODE, or None.
    ode_bracket : ``(low, high)`` heights of the route-2 runs that returned and did not.
    unbounded_above : height along ``sign * e`` beyond which the local dynamics leave the local box
        (grow without bound, for this analysis), or None.
    target : the local state reached beyond the threshold (or, spike-unstable, from the HSS), or None.
    """

    hss: Equilibrium | None
    well_mixed_stable: bool | None
    spike_stable: bool | None
    spike_eigenvalues: np.ndarray
    local_states: tuple[LocalState, ...]
    regime: str
    reason: str
    sign: int
    threshold_up: float | None = None
    threshold_down: float | None = None
    threshold: float | None = None
    threshold_boundary: float | None = None
    threshold_ode: float | None = None
    ode_bracket: tuple[float, float] | None = None
    unbounded_above: float | None = None
    target: LocalState | None = None


def local_eigenvalues(kin: Kinetics, state: np.ndarray) -> np.ndarray:
    """Eigenvalues of the slow-slow block ``J[slow][:, slow]`` of the Jacobian at a full state ``(n,)``."""
    slow = np.asarray(kin.slow, dtype=bool)
    return np.linalg.eigvals(kin.jac(state)[np.ix_(slow, slow)])


def default_local_box(kin: Kinetics, state: np.ndarray, *, factor: float = 100.0) -> tuple[np.ndarray, np.ndarray]:
    """Local box ``[min(0, 2 s*), max(factor * max(|u*|, 1), 2 s*)]`` for each slow species.

    A local spike can rise far above the HSS (the fast species feed it), hence the wide upper corner;
    concentrations are nonnegative, hence the lower corner 0 (extended if the HSS itself is negative).
    """
    state = np.asarray(state, dtype=float)
    s = state[np.asarray(kin.slow, dtype=bool)]
    top = factor * max(float(np.max(np.abs(state), initial=0.0)), 1.0)
    return np.minimum(0.0, 2 * s), np.maximum(top, 2 * s)


def local_states(
    kin: Kinetics,
    state: np.ndarray,
    lower: np.ndarray | None = None,
    upper: np.ndarray | None = None,
    *,
    points: int = 2000,
    starts: int = 32,
    seed: int = 0,
) -> tuple[LocalState, ...]:
    """All roots of ``f_slow(s, u_fast*) = 0`` in the local box, the HSS's own ``s*`` among them.

    One slow species: every sign change on a dense linear-plus-logarithmic grid (``points`` of each, and
    ``s*``) is refined by ``brentq`` (roots where the sign does not change, such as double roots, are
    missed). Several: multi-start Newton with deflation (see :func:`harness.equilibria.all_roots`) from
    the starts of :func:`_local_starts`.
    """
    loc = _Local.at(kin, state, lower, upper)
    if loc.ns == 0:
        return ()
    if loc.ns == 1:
        roots = _scalar_roots(loc, points)
    else:
        roots = all_roots(
            loc.fun, loc.jac, loc.lo, loc.hi, starts=_local_starts(loc, starts, seed), known=loc.s_star[None, :]
        )
    return tuple(sorted((loc.state_at(r) for r in roots), key=lambda st: tuple(st.values)))


def _local_starts(loc: _Local, starts: int, seed: int) -> np.ndarray:
    """Newton starts ``(ns, m)`` for the local states: points on the lines through ``s*`` along each slow
    species (geometric steps both ways: local states often differ from the HSS mostly in one species),
    then scrambled Sobol points alternately spread linearly and logarithmically over the box (local
    structure tends to sit at small concentrations of a box that reaches far up)."""
    steps = np.geomspace(1e-3, 1.0, 12)
    line = [loc.s_star]
    for i in range(loc.ns):
        for sgn, room in ((1.0, loc.hi[i] - loc.s_star[i]), (-1.0, loc.s_star[i] - loc.lo[i])):
            for h in steps * room:
                p = loc.s_star.copy()
                p[i] += sgn * h
                line.append(p)
    m = int(np.ceil(np.log2(max(2, starts))))
    u = sobol(loc.ns, m, seed)
    lin = loc.lo + u * loc.width
    log = loc.lo + loc.width * 10.0 ** (-6.0 * (1.0 - u))
    spread = np.empty((2 * len(u), loc.ns))
    spread[0::2], spread[1::2] = lin, log
    return np.vstack([np.array(line), spread]).T


def spike_analysis(
    kin: Kinetics,
    hss: Equilibrium | None,
    pulse_species: tuple[str, ...],
    sign: int = 1,
    *,
    lower: np.ndarray | None = None,
    upper: np.ndarray | None = None,
    rtol: float = 1e-10,
    use_boundary_hint: bool = True,
) -> SpikePrediction:
    """The spike-limit regime, pulse thresholds and local states at one HSS.

    Parameters
    ----------
    kin : the kinetics at this sweep point.
    hss : the HSS to analyse (None if lost: the regime is then "unresolved").
    pulse_species : species the pulse raises; only the slow ones count (see the module docstring).
    sign : +1 for a pulse up, -1 for a pulse down (the sign of the case's pulse height).
    lower, upper : local box for the slow species (default :func:`default_local_box`). Heights are tried
        up to its edge, and leaving it counts as growth without bound.
    rtol : relative tolerance of the local ODE runs of route 2.
    use_boundary_hint : where route 1 gives a height ``h1``, route 2 first runs ``h1 (1 -+ 1e-8)``; if
        they straddle the basin boundary that bracket is route 2's answer, else it falls back to its own
        scan and bisection (always used with False).

    Returns
    -------
    The prediction; see :class:`SpikePrediction`.
    """
    if sign not in (1, -1):
        msg = f"`sign` must be +1 or -1, got {sign}."
        raise ValueError(msg)
    unknown = [p for p in pulse_species if p not in kin.species]
    if unknown:
        msg = f"`pulse_species` has unknown species {unknown}; the species are {list(kin.species)}."
        raise ValueError(msg)
    base = {"sign": sign, "spike_eigenvalues": np.zeros(0), "local_states": ()}
    if hss is None:
        return SpikePrediction(
            hss=None,
            well_mixed_stable=None,
            spike_stable=None,
            regime="unresolved",
            reason="no homogeneous steady state (the baseline was lost)",
            **base,
        )
    loc = _Local.at(kin, hss.state, lower, upper)
    if loc.ns == 0:
        return SpikePrediction(
            hss=hss,
            well_mixed_stable=hss.stable,
            spike_stable=None,
            regime="unresolved",
            reason="the model has no slow species, so the spike limit is empty",
            **base,
        )
    states = local_states(kin, hss.state, loc.lo, loc.hi)
    eig = local_eigenvalues(kin, hss.state)
    stable = bool(np.all(eig.real < 0))
    slow_names = [n for n, s in zip(kin.species, loc.slow) if s]
    e = np.array([1.0 if n in pulse_species else 0.0 for n in slow_names])
    common = {
        "hss": hss,
        "well_mixed_stable": hss.stable,
        "spike_stable": stable,
        "spike_eigenvalues": eig,
        "local_states": states,
        "sign": sign,
    }
    if stable:
        out = _pulse_regime(loc, states, e, sign, rtol, use_boundary_hint)
    else:
        out = _unstable_regime(loc, states, e, sign)
    if not hss.stable:
        out["reason"] += "; the HSS is unstable in the well-mixed system, so this describes the reduced system"
    return SpikePrediction(**common, **out)


# ---------------------------------------------------------------------------------------------------------
# The local system


@dataclass(frozen=True)
class _Local:
    """The local ODE ``ds/dt = f_slow(s, u_fast*)`` at an HSS, with its box."""

    kin: Kinetics
    u_star: np.ndarray
    slow: np.ndarray
    lo: np.ndarray
    hi: np.ndarray

    @classmethod
    def at(cls, kin: Kinetics, state, lower, upper) -> _Local:
        """The local system at full state ``state``, box defaulting to :func:`default_local_box`."""
        state = np.asarray(state, dtype=float)
        slow = np.asarray(kin.slow, dtype=bool)
        dlo, dhi = default_local_box(kin, state)
        lo = dlo if lower is None else np.broadcast_to(np.asarray(lower, dtype=float), dlo.shape).copy()
        hi = dhi if upper is None else np.broadcast_to(np.asarray(upper, dtype=float), dhi.shape).copy()
        if not np.all(hi > lo):
            msg = "`upper` must exceed `lower` for every slow species."
            raise ValueError(msg)
        if np.any(state[slow] < lo) or np.any(state[slow] > hi):
            msg = "`lower` and `upper` must contain the HSS's slow values."
            raise ValueError(msg)
        return cls(kin=kin, u_star=state, slow=slow, lo=lo, hi=hi)

    @property
    def ns(self) -> int:
        """Number of slow species."""
        return int(self.slow.sum())

    @property
    def s_star(self) -> np.ndarray:
        """The HSS's slow values."""
        return self.u_star[self.slow]

    @property
    def width(self) -> np.ndarray:
        """Box widths, the unit of every distance here."""
        return self.hi - self.lo

    def _full(self, s: np.ndarray) -> np.ndarray:
        u = np.repeat(self.u_star[:, None], s.shape[1], axis=1)
        u[self.slow] = s
        return u

    def fun(self, s: np.ndarray) -> np.ndarray:
        """``f_slow`` at local states ``s (ns, m)``."""
        return self.kin.reaction(self._full(s))[self.slow]

    def jac(self, s: np.ndarray) -> np.ndarray:
        """Slow-slow Jacobian block ``(ns, ns, m)`` at ``s (ns, m)``."""
        return self.kin.jacobian(self._full(s))[np.ix_(self.slow, self.slow)]

    def state_at(self, s: np.ndarray) -> LocalState:
        """The local state at ``s``, with its stability."""
        s = np.asarray(s, dtype=float)
        eig = np.linalg.eigvals(self.jac(s[:, None])[:, :, 0])
        is_hss = bool(np.max(np.abs(s - self.s_star) / self.width) <= 1e-9)
        return LocalState(values=s, eigenvalues=eig, stable=bool(np.all(eig.real < 0)), is_hss=is_hss)


def _scalar_roots(loc: _Local, points: int) -> list[np.ndarray]:
    """Roots of the scalar local equation on the box, ``s*`` itself included exactly."""
    lo, hi, s0 = float(loc.lo[0]), float(loc.hi[0]), float(loc.s_star[0])
    width = hi - lo
    grid = np.unique(
        np.concatenate([np.linspace(lo, hi, points), lo + np.geomspace(1e-10 * width, width, points), [s0]])
    )
    grid = grid[(grid >= lo) & (grid <= hi)]
    with np.errstate(all="ignore"):
        vals = loc.fun(grid[None, :])[0]
    finite = np.isfinite(vals)
    roots = list(grid[finite & (vals == 0)])
    sgn = np.sign(np.where(finite, vals, 0.0))
    for i in np.flatnonzero(sgn[:-1] * sgn[1:] < 0):
        roots.append(
            brentq(
                lambda x: float(loc.fun(np.array([[x]]))[0, 0]),
                grid[i],
                grid[i + 1],
                xtol=1e-15 * max(width, 1.0),
                rtol=4 * np.finfo(float).eps,
            )
        )
    roots = [r for r in roots if abs(r - s0) > 1e-9 * width] + [s0]
    roots.sort()
    distinct = [r for i, r in enumerate(roots) if i == 0 or r - roots[i - 1] > 1e-12 * width]
    return [np.array([r]) for r in distinct]


# ---------------------------------------------------------------------------------------------------------
# Trajectories of the local ODE


@dataclass(frozen=True)
class _Fate:
    """Where one local trajectory went: "reached" (``index`` into the attractors), "escaped" (left the box),
    "oscillates", or "unsettled" (none of these by the time limit)."""

    kind: str
    index: int | None = None


def _fate(
    loc: _Local,
    s0: np.ndarray,
    attractors: list[np.ndarray],
    others: list[np.ndarray],
    rtol: float,
    radii: np.ndarray | None = None,
) -> _Fate:
    """Run the local ODE from ``s0`` until it nears a stable local state, leaves the box or oscillates.

    "Near" is a ball around each of the ``attractors`` smaller than a quarter of its distance to any other
    local state (``others`` are the unstable ones) and than half its distance to ``s0``. LSODA with the
    analytic Jacobian; the run goes in eight chunks growing by half each (from ``20 / rate``, ``rate`` the
    slowest local eigenvalue's modulus) and stops at the first such event; the maxima of each species are
    located exactly (events) for the cycle test of :func:`_is_cycle`. ``radii`` overrides the balls' radii
    (for a run that continues another).
    """
    width = loc.width
    lo_out, hi_out = loc.lo - 1e-6 * width, loc.hi + 1e-6 * width
    if np.any(s0 < lo_out) or np.any(s0 > hi_out):
        return _Fate("escaped")
    pts = np.array(attractors).reshape(-1, loc.ns)
    start = np.max(np.abs(pts - s0) / width, axis=1) if len(pts) else np.array([np.inf])
    if np.min(start) <= 1e-9:  # a start at round-off distance from an attractor is there already
        return _Fate("reached", int(np.argmin(start)))
    every = np.vstack([pts, np.array(others).reshape(-1, loc.ns)])
    sep = [np.max(np.abs(a - b) / width) for i, a in enumerate(every) for b in every[i + 1 :]]
    radius = min([1e-3, *(0.25 * x for x in sep)])

    def near(k: int):
        rk = min(radius, 0.5 * float(np.sqrt(np.sum(((s0 - pts[k]) / width) ** 2))))
        rk = rk if radii is None else float(radii[k])

        def event(t, y):
            return float(np.sum(((y - pts[k]) / width) ** 2) - rk**2)

        event.terminal, event.direction = True, -1
        return event

    def leave(t, y):
        return float(min(np.min((y - lo_out) / width), np.min((hi_out - y) / width)))

    leave.terminal, leave.direction = True, -1

    memo: dict[bytes, np.ndarray] = {}

    def slope(y: np.ndarray) -> np.ndarray:  # the peak events share one evaluation per point
        key = y.tobytes()
        if key not in memo:
            memo.clear()
            memo[key] = loc.fun(y[:, None])[:, 0]
        return memo[key]

    def peak(i: int):
        def event(t, y):
            return float(slope(y)[i])

        event.terminal, event.direction = False, -1
        return event

    stops = [near(k) for k in range(len(pts))] + [leave]
    events = stops + ([peak(i) for i in range(loc.ns)] if loc.ns > 1 else [])
    peaks: list[list[float]] = [[] for _ in range(loc.ns)]

    def rhs(t, y):
        return loc.fun(y[:, None])[:, 0]

    def jac(t, y):
        return loc.jac(y[:, None])[:, :, 0]

    mags = np.abs(np.concatenate([np.linalg.eigvals(jac(0.0, s)) for s in [loc.s_star, *pts]]))
    rate = max(float(np.min(mags)), 1e-6 * float(np.max(mags)), 1e-12)
    span, t0, y = 20.0 / rate, 0.0, np.array(s0, dtype=float)
    atol = 1e-2 * rtol * width
    with np.errstate(all="ignore"):
        for _ in range(8):
            try:
                sol = solve_ivp(rhs, (t0, t0 + span), y, method="LSODA", jac=jac, events=events, rtol=rtol, atol=atol)
            except ValueError:  # a peak event at round-off level near rest confused the event root search
                sol = solve_ivp(rhs, (t0, t0 + span), y, method="LSODA", jac=jac, events=stops, rtol=rtol, atol=atol)
                sol.y_events = [*sol.y_events, *([np.empty((0, loc.ns))] * loc.ns)]
            if sol.status == 1:
                k = next(k for k, te in enumerate(sol.t_events[: len(stops)]) if te.size)
                return _Fate("escaped") if k == len(pts) else _Fate("reached", k)
            if sol.status < 0 or not np.all(np.isfinite(sol.y[:, -1])):
                return _Fate("escaped")
            if loc.ns > 1:
                for i in range(loc.ns):
                    peaks[i].extend(np.reshape(sol.y_events[len(stops) + i], (-1, loc.ns))[:, i] / width[i])
                k = int(np.argmax(np.ptp(sol.y / width[:, None], axis=1)))
                if _is_cycle(np.array(peaks[k]), float(np.ptp(sol.y[k]) / width[k]), rtol):
                    return _Fate("oscillates")
            t0, y, span = sol.t[-1], sol.y[:, -1], 1.5 * span
    return _Fate("unsettled")


def _fates(
    loc: _Local, starts: np.ndarray, attractors: list[np.ndarray], others: list[np.ndarray], rtol: float
) -> list[_Fate]:
    """:func:`_fate` for many starts ``(k, ns)`` at once: one ODE system of all of them (the kinetics are
    vectorised, so a step costs about as much as for one), checked for arrivals at the ends of four
    growing chunks, which stop early when one leaves the box or the last one arrives; those still
    undecided then (cycles, slow ones) go on alone in :func:`_fate`."""
    width = loc.width
    lo_out, hi_out = loc.lo - 1e-6 * width, loc.hi + 1e-6 * width
    pts = np.array(attractors).reshape(-1, loc.ns)
    every = np.vstack([pts, np.array(others).reshape(-1, loc.ns)])
    sep = [np.max(np.abs(a - b) / width) for i, a in enumerate(every) for b in every[i + 1 :]]
    radius = min([1e-3, *(0.25 * x for x in sep)])
    dist = np.sqrt(np.sum(((starts[:, None, :] - pts[None, :, :]) / width) ** 2, axis=2))  # (k, attractors)
    radii = np.minimum(radius, 0.5 * dist)
    out: list[_Fate | None] = [None] * len(starts)
    for k, s0 in enumerate(starts):
        if np.any(s0 < lo_out) or np.any(s0 > hi_out):
            out[k] = _Fate("escaped")
        elif len(pts) and np.min(np.max(np.abs(pts - s0) / width, axis=1)) <= 1e-9:
            out[k] = _Fate("reached", int(np.argmin(np.max(np.abs(pts - s0) / width, axis=1))))
    live = [k for k in range(len(starts)) if out[k] is None]
    mags = np.abs(np.concatenate([np.linalg.eigvals(loc.jac(s[:, None])[:, :, 0]) for s in [loc.s_star, *pts]]))
    span, t0 = 20.0 / max(float(np.min(mags)), 1e-6 * float(np.max(mags)), 1e-12), 0.0
    y = starts[live].T.copy()
    with np.errstate(all="ignore"):
        chunks = 0
        for _ in range(4 + len(starts)):  # an escape ends a chunk early without using it up
            if not live or chunks == 4:
                break
            m = len(live)
            rows = (np.arange(loc.ns)[:, None, None] * m + np.arange(m)).repeat(loc.ns, axis=1)
            cols = (np.arange(loc.ns)[None, :, None] * m + np.arange(m)).repeat(loc.ns, axis=0)

            def rhs(t, z, m=m):
                return loc.fun(z.reshape(loc.ns, m)).ravel()

            def jac(t, z, m=m, rows=rows, cols=cols):
                big = np.zeros((loc.ns * m, loc.ns * m))
                big[rows, cols] = loc.jac(z.reshape(loc.ns, m))
                return big

            lo_f, hi_f, w_f = (np.repeat(v, m) for v in (lo_out, hi_out, width))

            def leave(t, z, lo_f=lo_f, hi_f=hi_f, w_f=w_f):
                return float(min(((z - lo_f) / w_f).min(), ((hi_f - z) / w_f).min()))

            leave.terminal, leave.direction = True, -1
            r2 = radii[live] ** 2  # (m, attractors)

            def settled(t, z, m=m, r2=r2):  # crosses zero when the last run enters an attractor's ball
                q = z.reshape(loc.ns, m)
                d2 = np.sum(((q[:, :, None] - pts.T[:, None, :]) / width[:, None, None]) ** 2, axis=0)
                return float(np.max(np.min(d2 - r2, axis=1)))

            settled.terminal, settled.direction = True, -1
            opts = {"method": "LSODA", "jac": jac, "rtol": rtol, "atol": np.repeat(1e-2 * rtol * width, m)}
            try:
                sol = solve_ivp(
                    rhs, (t0, t0 + span), y.ravel(), events=[leave, settled] if len(pts) else [leave], **opts
                )
            except ValueError:  # the event root search met a sign mismatch at round-off level: drop `settled`
                sol = solve_ivp(rhs, (t0, t0 + span), y.ravel(), events=[leave], **opts)
            q = sol.y[:, -1].reshape(loc.ns, m)
            if sol.status < 0 or not np.all(np.isfinite(q)):
                y = q if np.all(np.isfinite(q)) else y
                break  # the joint run failed: each goes on alone
            edge = np.minimum((q - lo_out[:, None]) / width[:, None], (hi_out[:, None] - q) / width[:, None]).min(0)
            gone = edge <= 1e-9
            if sol.status == 1 and sol.t_events[0].size:
                gone[int(np.argmin(edge))] = True
            keep = []
            for j, k in enumerate(live):
                d = np.sqrt(np.sum(((q[:, j] - pts) / width) ** 2, axis=1)) if len(pts) else np.array([])
                hit = np.flatnonzero(d <= radii[k] * (1 + 1e-6))
                if gone[j]:
                    out[k] = _Fate("escaped")
                elif hit.size:
                    out[k] = _Fate("reached", int(hit[0]))
                else:
                    keep.append(j)
            live = [live[j] for j in keep]
            y = q[:, keep]
            t0 = sol.t[-1]
            if sol.status != 1:
                chunks, span = chunks + 1, 1.5 * span
    for j, k in enumerate(live):
        out[k] = _fate(loc, y[:, j], attractors, others, rtol, radii[k])
    return out


def _is_cycle(peaks: np.ndarray, spread: float, rtol: float) -> bool:
    """Have the successive maxima ``peaks`` of a species (range ``spread`` in the last chunk) settled on a
    stable cycle? The last four agree to 1e-3 of the range, which is not tiny, and their differences shrink
    (or sit at the integration's noise): lingering near an unstable cycle, whose differences grow, fails.
    A focus decaying by less than that per turn passes too, the cost of not waiting for ever."""
    if peaks.size < 4 or spread <= 1e-6:
        return False
    p = peaks[-4:]
    d = np.abs(np.diff(p))
    return bool(np.ptp(p) <= 1e-3 * spread and d[-1] <= max(0.5 * d[0], 100 * rtol * spread))


# ---------------------------------------------------------------------------------------------------------
# Thresholds and regimes


@dataclass(frozen=True)
class _Ray:
    """What pulses along one direction do: the two routes, the bracket, the fate beyond, the growth."""

    boundary: float | None = None
    ode: float | None = None
    bracket: tuple[float, float] | None = None
    fate: _Fate | None = None
    unbounded: float | None = None

    @property
    def threshold(self) -> float | None:
        """Route 1 where it applies and route 2 did not contradict it, else route 2."""
        if self.boundary is not None and (self.bracket is None or _within(self.boundary, self.bracket)):
            return self.boundary
        return self.ode


def _within(h: float, bracket: tuple[float, float], rtol: float = 1e-6) -> bool:
    lo, hi = bracket
    return lo * (1 - rtol) <= h <= hi * (1 + rtol)


def _max_height(loc: _Local, d: np.ndarray) -> float:
    """Largest ``h`` with ``s* + h d`` in the box (``d`` nonzero)."""
    with np.errstate(divide="ignore"):
        up = np.where(d > 0, (loc.hi - loc.s_star) / d, np.inf)
        down = np.where(d < 0, (loc.lo - loc.s_star) / d, np.inf)
    return float(min(np.min(up), np.min(down)))


def _boundary(loc: _Local, states: tuple[LocalState, ...], d: np.ndarray) -> float | None:
    """Route 1: height to the nearest unstable local state on the ray ``s* + h d`` (``h > 0``)."""
    best = None
    for st in states:
        if st.stable or st.is_hss:
            continue
        v = st.values - loc.s_star
        h = float(v @ d / (d @ d))
        if h > 0 and np.max(np.abs(v - h * d) / loc.width) <= 1e-8 and (best is None or h < best):
            best = h
    return best


def _ray(
    loc: _Local, states: tuple[LocalState, ...], d: np.ndarray, rtol: float, ode: bool, hint: bool, xtol: float
) -> _Ray:
    """Thresholds along ``d``: route 1, and route 2 if ``ode`` (for one slow species only where route 1
    finds a boundary, since the flow is then monotone between roots), bisected to ``xtol`` relative."""
    hmax = _max_height(loc, d)
    boundary = _boundary(loc, states, d)
    scalar = loc.ns == 1
    unbounded = _scalar_unbounded(loc, states, d, hmax) if scalar else None
    if hmax * np.max(np.abs(d) / loc.width) <= 1e-9 or not ode or (scalar and boundary is None):
        return _Ray(boundary=boundary, unbounded=unbounded)
    attractors = [st.values for st in states if st.stable]
    others = [st.values for st in states if not st.stable]
    home = next(k for k, st in enumerate(s for s in states if s.stable) if st.is_hss)

    def fate(h: float, tol: float = rtol) -> _Fate:
        return _fate(loc, loc.s_star + h * d, attractors, others, tol)

    def left(f: _Fate) -> bool:
        return not (f.kind == "reached" and f.index == home)

    # step: route 1's hint, checked by two runs that must straddle the boundary (and, for several slow
    # species, by runs at a half, a quarter and an eighth of it that must return), all at once
    if hint and boundary is not None and boundary < hmax:
        lo, hi = boundary * (1 - 1e-8), boundary * (1 + 1e-8)
        f_hi, f_lo = _fates(loc, loc.s_star + np.array([[hi], [lo]]) * d, attractors, others, rtol)
        far = np.array([boundary / 2, boundary / 4, boundary / 8, hmax])  # far from the boundary: looser
        checks = [] if scalar else _fates(loc, loc.s_star + far[:, None] * d, attractors, others, max(rtol, 1e-7))
        if left(f_hi) and not left(f_lo) and not any(left(f) for f in checks[:3]):
            if not scalar:
                unbounded = _unbounded_beyond(fate, [(hmax, checks[3])], hi, f_hi)
            return _Ray(boundary, 0.5 * (lo + hi), (lo, hi), f_hi, unbounded)
    # step: coarse scan of heights, all at once (looser tolerance: no start is near a boundary but by
    # chance; the two that bracket the first departure are checked tightly), then bisection between them
    heights = hmax * 8.0 ** -np.arange(5, -1, -1)
    fates = _fates(loc, loc.s_star + heights[:, None] * d, attractors, others, max(rtol, 1e-7))
    first = next((i for i, f in enumerate(fates) if left(f)), None)
    if first is not None and (not left(fate(heights[first])) or (first and left(fate(heights[first - 1])))):
        fates = _fates(loc, loc.s_star + heights[:, None] * d, attractors, others, rtol)  # redo it tightly
        first = next((i for i, f in enumerate(fates) if left(f)), None)
    if first is None:
        return _Ray(boundary=boundary, unbounded=unbounded)
    lo, hi, f_hi = (0.0 if first == 0 else float(heights[first - 1])), float(heights[first]), fates[first]
    while hi - lo > xtol * hi:  # multisection: seven heights at once cut the bracket eightfold
        mids = lo + (hi - lo) * np.arange(1, 8) / 8
        fs = _fates(loc, loc.s_star + mids[:, None] * d, attractors, others, rtol)
        out = next((i for i, f in enumerate(fs) if left(f)), None)
        if out is None:
            lo = float(mids[-1])
        else:
            lo, hi, f_hi = (lo if out == 0 else float(mids[out - 1])), float(mids[out]), fs[out]
    if not scalar:
        unbounded = _unbounded_beyond(fate, list(zip(heights[first:], fates[first:])), hi, f_hi)
    return _Ray(boundary, 0.5 * (lo + hi), (lo, hi), f_hi, unbounded)


def _scalar_unbounded(loc: _Local, states: tuple[LocalState, ...], d: np.ndarray, hmax: float) -> float | None:
    """One slow species: if the flow at the box edge along ``d`` points outward, the height of the last root
    before it (beyond that every pulse leaves the box)."""
    if hmax <= 0:
        return None
    edge = loc.s_star + hmax * d
    with np.errstate(all="ignore"):
        flow = float(loc.fun(edge[:, None])[0, 0] * d[0])
    if not flow > 0:
        return None
    beyond = [float((st.values - loc.s_star) @ d) for st in states]
    beyond = [h for h in beyond if h > 0]
    return max(beyond, default=0.0)


def _unbounded_beyond(fate, tried: list[tuple[float, _Fate]], hi: float, f_hi: _Fate) -> float | None:
    """Several slow species: least height beyond the threshold ``hi`` whose run escapes, from the runs
    ``tried`` (heights above ``hi``, ascending) refined by bisection to 1e-6 relative; None if none does."""
    if f_hi.kind == "escaped":
        return hi
    lo = hi
    for h, f in tried:
        if f.kind != "escaped":
            lo = max(lo, float(h))
            continue
        top = float(h)
        while top - lo > 1e-6 * top:
            mid = 0.5 * (lo + top)
            if fate(mid).kind == "escaped":
                top = mid
            else:
                lo = mid
        return top
    return None


def _pulse_regime(loc: _Local, states, e: np.ndarray, sign: int, rtol: float, hint: bool) -> dict:
    """Regime, thresholds and target for a spike-stable HSS, judged on pulses of the requested sign."""
    if not e.any():
        return {
            "regime": "no-pattern",
            "reason": "spike-stable HSS and no pulse species is slow (a fast pulse has no effect here)",
        }
    rays = {
        s: _ray(loc, states, s * e, rtol, ode=(s == sign or loc.ns > 1), hint=hint, xtol=1e-8 if s == sign else 1e-5)
        for s in (1, -1)
    }
    ray = rays[sign]
    out = {
        "threshold_up": rays[1].threshold,
        "threshold_down": rays[-1].threshold,
        "threshold": ray.threshold,
        "threshold_boundary": ray.boundary,
        "threshold_ode": ray.ode,
        "ode_bracket": ray.bracket,
        "unbounded_above": ray.unbounded,
    }
    word = "up" if sign > 0 else "down"
    other = rays[-sign].threshold
    note = "" if other is None else f" (a pulse of the other sign leaves above {other:.6g})"
    if ray.threshold is None:
        out.update(regime="no-pattern", reason=f"spike-stable HSS and every pulse {word} decays{note}")
        return out
    if ray.fate is None:  # route 1 only: one slow species, ODE not asked for
        beyond = _next_stable(loc, states, sign * e, ray.threshold)
        kind = "escaped" if beyond is None else "reached"
    else:
        kind = ray.fate.kind
        stable = [st for st in states if st.stable]
        beyond = stable[ray.fate.index] if kind == "reached" else None
    if kind == "reached":
        out.update(
            regime="pulse-triggered",
            target=beyond,
            reason=f"spike-stable HSS; a pulse {word} above {ray.threshold:.6g} reaches a stable local state",
        )
        if ray.unbounded is not None:
            out["reason"] += f", and above {ray.unbounded:.6g} grows without bound"
    elif kind == "oscillates":
        out.update(
            regime="pulse-triggered",
            reason=f"spike-stable HSS; a pulse {word} above {ray.threshold:.6g} reaches a local oscillation",
        )
    elif kind == "escaped":
        out.update(
            regime="no-pattern",
            threshold=None,  # leaving the basin here is growth, not a pattern: no pulse patterns
            unbounded_above=ray.threshold if ray.unbounded is None else ray.unbounded,
            reason=f"spike-stable HSS; a pulse {word} above {ray.threshold:.6g} grows without bound in the "
            "local dynamics, which is not a pattern",
        )
    else:
        out.update(
            regime="unresolved", reason=f"spike-stable HSS; a pulse {word} above {ray.threshold:.6g} did not settle"
        )
    if ray.boundary is not None and ray.ode is not None and abs(ray.boundary - ray.ode) > 1e-6 * ray.boundary:
        out["reason"] += f"; the routes disagree (boundary {ray.boundary:.8g}, ODE {ray.ode:.8g}): ODE taken"
    out["reason"] += note
    return out


def _next_stable(loc: _Local, states, d: np.ndarray, h: float) -> LocalState | None:
    """One slow species: the stable local state next beyond height ``h`` along ``d``, if any before a root."""
    ahead = [st for st in states if (st.values - loc.s_star) @ d > h]
    ahead.sort(key=lambda st: float((st.values - loc.s_star) @ d))
    return ahead[0] if ahead and ahead[0].stable else None


def _unstable_regime(loc: _Local, states, e: np.ndarray, sign: int) -> dict:
    """Regime for a spike-unstable HSS: where the local dynamics go from either side of its unstable mode."""
    jm = loc.jac(loc.s_star[:, None])[:, :, 0]
    lam, vec = np.linalg.eig(jm)
    v = vec[:, int(np.argmax(lam.real))]
    v = v.real if np.linalg.norm(v.real) > 1e-8 else v.imag
    v = v / np.max(np.abs(v) / loc.width)
    if e.any() and v @ e < 0:
        v = -v
    v = sign * v  # first side: along the pulse
    stable = [st for st in states if st.stable]
    attractors = [st.values for st in stable]
    others = [st.values for st in states if not st.stable]
    fates, sides = [], []
    for side, name in ((1, "along the pulse"), (-1, "against it")):
        s0 = loc.s_star + side * 1e-4 * v
        if np.all(s0 >= loc.lo) and np.all(s0 <= loc.hi):  # a side outside the box (e.g. negative) is moot
            fates.append(_fate(loc, s0, attractors, others, 1e-8))
            sides.append(name)
    kinds = [f.kind for f in fates]
    if not kinds:
        return {"regime": "unresolved", "reason": "spike-unstable HSS whose unstable mode leaves the local box"}
    if "escaped" in kinds:
        seen = ", ".join(f"{n}: {k}" for n, k in zip(sides, kinds))
        return {
            "regime": "unresolved",
            "reason": f"spike-unstable HSS and the local dynamics grow without bound ({seen})",
        }
    if "reached" in kinds:
        f = fates[kinds.index("reached")]
        return {
            "regime": "self-patterning",
            "target": stable[f.index],
            "reason": f"spike-unstable HSS; the local dynamics settle on a stable local state ({'/'.join(kinds)})",
        }
    if "oscillates" in kinds:
        return {
            "regime": "self-oscillating",
            "reason": "spike-unstable HSS; the local dynamics settle on an oscillation",
        }
    return {"regime": "unresolved", "reason": "spike-unstable HSS and the local dynamics did not settle"}
