"""Continuation of the reduced (spike-limit) system over the sweep parameter, with its special points.

Curves ``F(z) = 0``, ``F : R^(d+1) -> R^d`` (the parameter last in ``z``), are followed by pseudo-arclength
continuation: a tangent predictor ``z + h t`` and a Newton corrector on ``[F(z); t . (z - z_pred)] = 0``,
in coordinates scaled by the starting point (the parameter by the sweep's span). A step is accepted when
Newton contracts, the new tangent turns by less than ~37 degrees and the step stays near ``h``; ``h`` halves
on failure and grows by half after an easy step. Two systems are continued:

* the **global branch**, the well-mixed HSS: ``[Q.T f(u, p); W u - T] = 0`` (the conservation rows ``W``
  replace as many equations as there are laws; ``T`` from the case's guess), and
* the **local branches**, the extended system in ``(u, s, p)``: the global equations plus
  ``f_slow(s, u_fast, p) = 0``, so that a local state follows the HSS it belongs to.

Special points are sign changes of test functions between accepted points, located by ``brentq`` on the
secant between them (each trial point corrected onto the curve), which pins the parameter to ~1e-10 of the
step. Tests: *fold*, the parameter component of the oriented tangent; *branch point* (of the continued
system), ``det [F_z; t]``; *Hopf*, the bialternate-product determinant ``prod_{i<j} (l_i + l_j)`` over the
eigenvalues (conserved zeros left out), kept only where a pair really sits on the imaginary axis (else a
neutral saddle); and on the global branch the *spike* tests, ``det L`` and the bialternate of ``L``,
``L = J[slow, slow]`` at the HSS: ``det L = 0`` is where local branches cross the global one (the HSS's own
slow values are always a local state), and branch switching there starts them along the null vector of
``L``. Local folds are told from global ones by the tangent: at a local fold only ``s`` moves.

Regime boundaries (:func:`regime_boundaries`) put each change of the point-wise regime between two sweep
points at the special point that explains it, checked by the point-wise analysis either side of it; changes
that no special point explains are located by bisection. Orbits born at Hopf points: `harness.periodic`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.optimize import brentq

from .kinetics import Kinetics, conserved_basis

__all__ = [
    "Boundary",
    "Branch",
    "Diagram",
    "Family",
    "SpecialPoint",
    "ThresholdCurve",
    "bialternate_test",
    "critical_ratio_curve",
    "global_branch",
    "hss_near",
    "local_branch",
    "reduced_diagram",
    "regime_boundaries",
    "threshold_curves",
]

Family = Callable[[float], Kinetics]
"""The kinetics at a value of the sweep parameter, with ``dparam`` set (``Model.kinetics(values, name)``)."""


@dataclass(frozen=True)
class SpecialPoint:
    """A located special point.

    Attributes
    ----------
    kind : ``"fold"``, ``"hopf"`` or ``"branch"``.
    branch : ``"global"`` (of the well-mixed HSS) or ``"local"`` (of the local dynamics; a Hopf of the local
        dynamics at the HSS's own slow values is ``"local"`` too).
    parameter : the sweep parameter's value there.
    state : ``(n,)`` the HSS there.
    local : ``(n_slow,)`` the local state there (the HSS's slow values on the global branch).
    frequency : the crossing pair's angular frequency (Hopf only).
    direction : ``(n_slow,)`` null vector of the local block (spike branch points only), for branch switching.
    """

    kind: str
    branch: str
    parameter: float
    state: np.ndarray
    local: np.ndarray
    frequency: float | None = None
    direction: np.ndarray | None = None


@dataclass(frozen=True)
class Branch:
    """A continued curve, in continuation order.

    Attributes
    ----------
    kind : ``"global"`` or ``"local"``.
    parameter : ``(m,)`` sweep parameter values.
    states : ``(m, n)`` the HSS at each point.
    local : ``(m, n_slow)`` the local state (on the global branch, the HSS's slow values).
    stable : ``(m,)`` global: stable well-mixed and to spikes; local: the local state is stable.
    well_mixed_stable : ``(m,)`` global only (local branches copy their HSS's).
    growth : ``(m,)`` largest real part of the relevant eigenvalues (well-mixed and spike for global, local).
    points : the special points found on it.
    """

    kind: str
    parameter: np.ndarray
    states: np.ndarray
    local: np.ndarray
    stable: np.ndarray
    well_mixed_stable: np.ndarray
    growth: np.ndarray
    points: tuple[SpecialPoint, ...] = ()


@dataclass(frozen=True)
class Diagram:
    """Every branch of the reduced system over a parameter range: the global one first."""

    parameter: str
    species: tuple[str, ...]
    slow: np.ndarray
    branches: tuple[Branch, ...]

    @property
    def points(self) -> tuple[SpecialPoint, ...]:
        """All special points, sorted by parameter, duplicates (same kind, place) removed."""
        every = sorted((pt for b in self.branches for pt in b.points), key=lambda pt: pt.parameter)
        out: list[SpecialPoint] = []
        for pt in every:
            if not any(_same_point(pt, q) for q in out):
                out.append(pt)
        return tuple(out)


def _same_point(a: SpecialPoint, b: SpecialPoint) -> bool:
    if a.kind != b.kind or a.branch != b.branch:
        return False
    scale = max(1.0, float(np.max(np.abs(a.state), initial=0.0)))
    return abs(a.parameter - b.parameter) <= 1e-7 * max(1.0, abs(a.parameter)) and bool(
        np.max(np.abs(a.local - b.local), initial=0.0) <= 1e-5 * scale
    )


# ---------------------------------------------------------------------------------------------------------
# Test functions


def bialternate_test(jac: np.ndarray) -> float:
    """``prod_{i<j} (l_i + l_j)`` over the eigenvalues of ``jac``: the determinant of the bialternate product
    ``2 J (.) I``, real, and zero where a pair sums to zero (a Hopf pair ``+-i w`` or a neutral saddle)."""
    lam = np.linalg.eigvals(np.atleast_2d(jac))
    i, j = np.triu_indices(lam.size, 1)
    return float(np.prod(lam[i] + lam[j]).real) if i.size else 1.0


def _hopf_frequency(jac: np.ndarray) -> float | None:
    """The angular frequency of an eigenvalue pair on the imaginary axis, or None (none there: a neutral saddle)."""
    lam = np.linalg.eigvals(np.atleast_2d(jac))
    scale = max(1.0, float(np.max(np.abs(lam), initial=0.0)))
    on_axis = [abs(v.imag) for v in lam if abs(v.real) <= 1e-6 * scale and abs(v.imag) > 1e-8 * scale]
    return max(on_axis) if on_axis else None


# ---------------------------------------------------------------------------------------------------------
# Systems


@dataclass(frozen=True)
class _System:
    """``F(z)`` and ``F_z (d, d+1)`` of one continued system, with what the tests need to read ``z``."""

    fun: Callable[[np.ndarray], np.ndarray]
    jac: Callable[[np.ndarray], np.ndarray]
    kin: Callable[[float], Kinetics]
    n: int
    slow: np.ndarray
    conservation: np.ndarray
    local: bool

    def split(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """HSS, local state and parameter of a point ``z``."""
        u = z[: self.n]
        s = z[self.n : -1] if self.local else u[self.slow]
        return u, s, float(z[-1])

    def local_block(self, z: np.ndarray) -> np.ndarray:
        """``J[slow, slow]`` at the local state of ``z``."""
        u, s, p = self.split(z)
        v = u.copy()
        v[self.slow] = s
        return self.kin(p).jac(v)[np.ix_(self.slow, self.slow)]

    def reduced_jacobian(self, z: np.ndarray) -> np.ndarray:
        """``Q.T J Q`` of the well-mixed system at the HSS of ``z`` (conserved directions left out)."""
        u, _, p = self.split(z)
        q = conserved_basis(self.conservation, self.n)
        return q.T @ self.kin(p).jac(u) @ q


def _cached(family: Family) -> Callable[[float], Kinetics]:
    return lru_cache(maxsize=8)(lambda p: family(float(p)))


def _global_parts(kin: Kinetics, u: np.ndarray, w: np.ndarray, t: np.ndarray, q: np.ndarray):
    """Residual ``(n,)`` and Jacobian ``(n, n+1)`` of the augmented well-mixed system at ``u``."""
    if kin.dparam is None:
        msg = "`family` must give kinetics with `dparam` (bind the sweep parameter)."
        raise ValueError(msg)
    f, jm, fp = kin.f(u), kin.jac(u), kin.dparam(u[:, None])[:, 0]
    if w.shape[0] == 0:
        return f, np.hstack([jm, fp[:, None]])
    res = np.concatenate([q.T @ f, w @ u - t])
    top = np.hstack([q.T @ jm, (q.T @ fp)[:, None]])
    return res, np.vstack([top, np.hstack([w, np.zeros((w.shape[0], 1))])])


def _build(family: Family, p0: float, totals: np.ndarray | None, local: bool) -> _System:
    """The global (``local=False``) or extended local system of ``family``, totals ``T`` per conservation row."""
    kin = _cached(family)
    k0 = kin(p0)
    n = k0.n
    w = np.asarray(k0.conservation, dtype=float).reshape(-1, n)
    t = np.zeros(w.shape[0]) if totals is None else np.asarray(totals, dtype=float).reshape(w.shape[0])
    q = conserved_basis(w, n)
    slow = np.asarray(k0.slow, dtype=bool)
    ns = int(slow.sum())

    def parts(z: np.ndarray):
        p = float(z[-1])
        k = kin(p)
        u = z[:n]
        res, jg = _global_parts(k, u, w, t, q)
        if not local:
            return res, jg
        v = u.copy()
        v[slow] = z[n:-1]
        fv, jv, fpv = k.f(v), k.jac(v), k.dparam(v[:, None])[:, 0]
        jl = np.zeros((ns, n + ns + 1))
        fast_cols = np.flatnonzero(~slow)
        jl[:, fast_cols] = jv[np.ix_(slow, ~slow)]
        jl[:, n : n + ns] = jv[np.ix_(slow, slow)]
        jl[:, -1] = fpv[slow]
        top = np.hstack([jg[:, :n], np.zeros((n, ns)), jg[:, n:]])
        return np.concatenate([res, fv[slow]]), np.vstack([top, jl])

    return _System(
        fun=lambda z: parts(z)[0], jac=lambda z: parts(z)[1], kin=kin, n=n, slow=slow, conservation=w, local=local
    )


# ---------------------------------------------------------------------------------------------------------
# Pseudo-arclength continuation (scaled coordinates)


@dataclass(frozen=True)
class _Curve:
    z: np.ndarray  # (m, d+1) unscaled points
    t: np.ndarray  # (m, d+1) scaled unit tangents
    tests: dict[str, np.ndarray]


def _tangent(jz: np.ndarray, ref: np.ndarray) -> np.ndarray | None:
    """Unit null vector of ``jz (d, d+1)`` with positive projection on ``ref``."""
    a = np.vstack([jz, ref])
    rhs = np.zeros(a.shape[0])
    rhs[-1] = 1.0
    try:
        t = np.linalg.solve(a, rhs)
    except np.linalg.LinAlgError:
        return None
    norm = np.linalg.norm(t)
    return t / norm if np.isfinite(norm) and norm > 0 else None


def _correct(fun, jac, z_pred: np.ndarray, normal: np.ndarray, tol: float = 1e-11, max_iter: int = 10):
    """Newton on ``[F(z); normal . (z - z_pred)] = 0`` from ``z_pred`` (scaled); the point or None."""
    z = z_pred.copy()
    last = np.inf
    with np.errstate(all="ignore"):
        for it in range(max_iter):
            r = np.concatenate([fun(z), [normal @ (z - z_pred)]])
            a = np.vstack([jac(z), normal])
            try:
                dz = np.linalg.solve(a, -r)
            except np.linalg.LinAlgError:
                return None, it
            size = float(np.max(np.abs(dz)))
            if not np.isfinite(size) or (it > 0 and size > 0.5 * last and size > 1e3 * tol):
                return None, it
            z = z + dz
            if size <= tol:
                return z, it + 1
            last = size
    return None, max_iter


def _continue(
    system: _System,
    z0: np.ndarray,
    direction: np.ndarray,
    scale: np.ndarray,
    inside: Callable[[np.ndarray], bool],
    tests: dict[str, Callable[[np.ndarray, np.ndarray, np.ndarray], float]],
    *,
    h0: float = 0.01,
    h_max: float = 0.03,
    h_min: float = 1e-7,
    max_steps: int = 600,
) -> _Curve:
    """Follow the curve through ``z0`` (unscaled, on the curve) leaving along ``direction`` until ``inside``
    fails or ``max_steps``; every test is evaluated at each accepted point (on scaled ``z``, ``t``, ``F_z``)."""

    def fun(y):
        return system.fun(y * scale)

    def jac(y):
        return system.jac(y * scale) * scale

    y = z0 / scale
    jz = jac(y)
    t = _tangent(jz, direction / scale / np.linalg.norm(direction / scale))
    if t is None:
        msg = "the start is singular: no unique tangent there"
        raise ValueError(msg)
    ys, ts, vals = [y], [t], {k: [f(y * scale, t, jz)] for k, f in tests.items()}
    h = h0
    for _ in range(max_steps):
        if h < h_min:
            break
        y_new, iters = _correct(fun, jac, y + h * t, t)
        ok = y_new is not None
        if ok:
            jz_new = jac(y_new)
            t_new = _tangent(jz_new, t)
            ok = t_new is not None and t_new @ t > 0.8 and np.linalg.norm(y_new - y) <= 2.0 * h
        if not ok:
            h /= 2
            continue
        y, t, jz = y_new, t_new, jz_new
        ys.append(y)
        ts.append(t)
        for k, f in tests.items():
            vals[k].append(f(y * scale, t, jz))
        if not inside(y * scale):
            break
        if iters <= 3:
            h = min(1.5 * h, h_max)
    return _Curve(z=np.array(ys) * scale, t=np.array(ts), tests={k: np.array(v) for k, v in vals.items()})


def _locate(system: _System, curve: _Curve, scale: np.ndarray, k: int, test, tol: float = 1e-13) -> tuple | None:
    """Zero of ``test`` between points ``k`` and ``k+1``: brentq on the secant, each trial corrected onto the
    curve in the hyperplane normal to the secant. Returns ``(z, t, F_z)`` (``z`` unscaled) or None."""
    a, b = curve.z[k] / scale, curve.z[k + 1] / scale
    d = (b - a) / np.linalg.norm(b - a)

    def fun(y):
        return system.fun(y * scale)

    def jac(y):
        return system.jac(y * scale) * scale

    def at(theta: float):
        y, _ = _correct(fun, jac, a + theta * (b - a), d, tol=tol, max_iter=14)
        if y is None:
            return None
        jz = jac(y)
        t = _tangent(jz, d)
        return None if t is None else (y, t, jz)

    def g(theta: float) -> float:
        found = at(theta)
        if found is None:
            msg = "correction failed"
            raise ArithmeticError(msg)
        y, t, jz = found
        return test(y * scale, t, jz)

    try:
        ga, gb = g(0.0), g(1.0)
        if ga == 0.0:
            theta = 0.0
        elif gb == 0.0:
            theta = 1.0
        elif ga * gb > 0:
            return None
        else:
            theta = brentq(g, 0.0, 1.0, xtol=min(1e-12, tol), rtol=4 * np.finfo(float).eps, maxiter=80)
    except (ArithmeticError, np.linalg.LinAlgError):
        return None
    y, t, jz = at(theta)
    return y * scale, t, jz


def _sign_changes(v: np.ndarray) -> np.ndarray:
    s = np.sign(v)
    return np.flatnonzero((s[:-1] * s[1:] < 0) & np.isfinite(v[:-1]) & np.isfinite(v[1:]))


# ---------------------------------------------------------------------------------------------------------
# Tests per system


def _global_tests(system: _System) -> dict[str, Callable]:
    tests = {
        "fold": lambda z, t, jz: float(t[-1]),
        "branch": lambda z, t, jz: float(np.linalg.det(np.vstack([jz, t]))),
    }
    m = system.n - system.conservation.shape[0]
    if m >= 2:
        tests["hopf"] = lambda z, t, jz: bialternate_test(system.reduced_jacobian(z))
    ns = int(system.slow.sum())
    if ns >= 1:
        tests["spike-branch"] = lambda z, t, jz: float(np.linalg.det(system.local_block(z)))
    if ns >= 2:
        tests["spike-hopf"] = lambda z, t, jz: bialternate_test(system.local_block(z))
    return tests


def _local_tests(system: _System) -> dict[str, Callable]:
    tests = {"fold": lambda z, t, jz: float(t[-1])}
    if int(system.slow.sum()) >= 2:
        tests["hopf"] = lambda z, t, jz: bialternate_test(system.local_block(z))
    return tests


def _special(system: _System, name: str, z: np.ndarray, t: np.ndarray) -> SpecialPoint | None:
    """The special point a located zero of test ``name`` stands for, or None (a spurious zero)."""
    u, s, p = system.split(z)
    n = system.n
    common = {"parameter": p, "state": u.copy(), "local": s.copy()}
    if name == "fold":
        if system.local:
            moved = np.linalg.norm(t[:n])  # at a local fold only s moves; else it is the HSS's own fold
            return SpecialPoint("fold", "local", **common) if moved <= 1e-3 * np.linalg.norm(t) else None
        return SpecialPoint("fold", "global", **common)
    if name == "branch":
        return None if system.local else SpecialPoint("branch", "global", **common)
    if name == "hopf":
        jm = system.local_block(z) if system.local else system.reduced_jacobian(z)
        w = _hopf_frequency(jm)
        return None if w is None else SpecialPoint("hopf", "local" if system.local else "global", frequency=w,
                                                   **common)
    if name == "spike-hopf":
        w = _hopf_frequency(system.local_block(z))
        return None if w is None else SpecialPoint("hopf", "local", frequency=w, **common)
    if name == "spike-branch":
        lam, vec = np.linalg.eig(system.local_block(z))
        i = int(np.argmin(np.abs(lam)))
        if abs(lam[i].imag) > 1e-9:
            return None
        v = vec[:, i].real
        return SpecialPoint("branch", "global", direction=v / np.linalg.norm(v), **common)
    return None


def _points(system: _System, curve: _Curve, scale: np.ndarray, tests: dict) -> tuple[SpecialPoint, ...]:
    out = []
    for name, values in curve.tests.items():
        for k in _sign_changes(values):
            found = _locate(system, curve, scale, int(k), tests[name])
            if found is None:
                continue
            pt = _special(system, name, found[0], found[1])
            if pt is not None:
                out.append(pt)
    return tuple(sorted(out, key=lambda pt: pt.parameter))


def _scale(z0: np.ndarray, span: float, typical: np.ndarray | None = None) -> np.ndarray:
    """Units of the scaled coordinates: ``typical`` sizes of the unknowns (default ``|z0|``, with a floor of
    1e-2 of the largest), and the parameter range's span."""
    x = np.abs(z0[:-1]) if typical is None else np.maximum(np.asarray(typical, dtype=float), np.abs(z0[:-1]))
    base = np.maximum(x, 1e-2 * max(float(x.max(initial=0.0)), 1e-6))
    return np.concatenate([base, [span]])


# ---------------------------------------------------------------------------------------------------------
# Branches


def _newton_fixed_p(system: _System, z: np.ndarray, tol: float = 1e-12) -> np.ndarray | None:
    """Newton at fixed parameter from ``z`` (unscaled); the corrected point or None."""
    z = z.copy()
    with np.errstate(all="ignore"):
        for _ in range(30):
            jz = system.jac(z)[:, :-1]
            try:
                dx = np.linalg.solve(jz, -system.fun(z))
            except np.linalg.LinAlgError:
                return None
            if not np.all(np.isfinite(dx)):
                return None
            z[:-1] += dx
            if np.max(np.abs(dx) / np.maximum(np.abs(z[:-1]), 1e-8)) <= tol:
                return z
    return None


def _box_inside(p_range: tuple[float, float], lower: np.ndarray, upper: np.ndarray):
    lo_p, hi_p = p_range
    pad = 1e-9 * (hi_p - lo_p)

    def inside(z: np.ndarray) -> bool:
        return bool(lo_p - pad <= z[-1] <= hi_p + pad and np.all(z[:-1] >= lower) and np.all(z[:-1] <= upper))

    return inside


def _branch_from(system: _System, curve: _Curve, points: tuple[SpecialPoint, ...]) -> Branch:
    zs = curve.z
    m = len(zs)
    n = system.n
    states = zs[:, :n]
    local = zs[:, n:-1] if system.local else states[:, system.slow]
    growth, stable, wm = np.empty(m), np.empty(m, bool), np.empty(m, bool)
    for i, z in enumerate(zs):
        red = np.linalg.eigvals(system.reduced_jacobian(z)) if n > system.conservation.shape[0] else np.zeros(0)
        g_wm = float(np.max(red.real, initial=-np.inf))
        g_loc = float(np.max(np.linalg.eigvals(system.local_block(z)).real, initial=-np.inf))
        wm[i] = g_wm < 0
        growth[i] = g_loc if system.local else max(g_wm, g_loc)
        stable[i] = g_loc < 0 if system.local else (g_wm < 0 and g_loc < 0)
    return Branch(kind="local" if system.local else "global", parameter=zs[:, -1].copy(), states=states.copy(),
                  local=local.copy(), stable=stable, well_mixed_stable=wm, growth=growth, points=points)


def global_branch(
    family: Family,
    u0: np.ndarray,
    p0: float,
    p_range: tuple[float, float],
    *,
    totals: np.ndarray | None = None,
    lower: np.ndarray | None = None,
    upper: np.ndarray | None = None,
    direction: int = 1,
    typical: np.ndarray | None = None,
    h_max: float = 0.05,
    max_steps: int = 1000,
) -> Branch:
    """The HSS branch through ``u0`` at ``p0``, continued while ``p`` stays in ``p_range`` (and the state in
    ``[lower, upper]``), leaving in the direction of increasing ``p`` (``direction=-1``: decreasing).

    ``totals`` are one per conservation row of the kinetics (default ``W @ u0``); ``typical`` ``(n,)`` sizes
    of the species set the units of arclength (default ``|u0|``). Special points on it:
    folds, branch points of the well-mixed system, Hopf points (``branch="global"``), and where the local
    block at the HSS turns singular (``kind="branch"``, with ``direction``) or has a Hopf pair
    (``kind="hopf"``, ``branch="local"``).
    """
    u0 = np.asarray(u0, dtype=float)
    k0 = family(float(p0))
    w = np.asarray(k0.conservation, dtype=float).reshape(-1, k0.n)
    totals = w @ u0 if totals is None else np.asarray(totals, dtype=float)
    system = _build(family, float(p0), totals, local=False)
    z0 = _newton_fixed_p(system, np.concatenate([u0, [p0]]))
    if z0 is None:
        msg = "`u0` is not near a steady state at `p0` (Newton did not converge)."
        raise ValueError(msg)
    span = float(p_range[1] - p_range[0])
    if not span > 0:
        msg = f"`p_range` must be increasing, got {p_range}."
        raise ValueError(msg)
    scale = _scale(z0, span, typical)
    lower = np.full(k0.n, -np.inf) if lower is None else np.asarray(lower, dtype=float)
    upper = np.full(k0.n, np.inf) if upper is None else np.asarray(upper, dtype=float)
    tests = _global_tests(system)
    d = np.zeros(k0.n + 1)
    d[-1] = float(direction)
    curve = _continue(system, z0, d, scale, _box_inside(p_range, lower, upper), tests, h_max=h_max,
                      max_steps=max_steps)
    return _branch_from(system, curve, _points(system, curve, scale, tests))


def local_branch(
    family: Family,
    u0: np.ndarray,
    s0: np.ndarray,
    p0: float,
    p_range: tuple[float, float],
    *,
    totals: np.ndarray | None = None,
    lower: np.ndarray | None = None,
    upper: np.ndarray | None = None,
    direction: np.ndarray | int = 1,
    typical: np.ndarray | None = None,
    h_max: float = 0.05,
    max_steps: int = 1000,
) -> Branch:
    """The local-state branch through ``(u0, s0, p0)``, continued with its HSS while ``p`` stays in
    ``p_range`` and the local state in ``[lower, upper]`` (slow species only).

    ``direction`` is +1 / -1 (increasing / decreasing ``p``) or a full vector in ``(u, s, p)``; ``typical``
    ``(n + n_slow,)`` sizes of ``(u, s)`` set the units of arclength. Special points:
    local folds and Hopf points of the local dynamics (``branch="local"``).
    """
    u0 = np.asarray(u0, dtype=float)
    s0 = np.asarray(s0, dtype=float).ravel()
    k0 = family(float(p0))
    w = np.asarray(k0.conservation, dtype=float).reshape(-1, k0.n)
    totals = w @ u0 if totals is None else np.asarray(totals, dtype=float)
    system = _build(family, float(p0), totals, local=True)
    z0 = _newton_fixed_p(system, np.concatenate([u0, s0, [p0]]))
    if z0 is None:
        msg = "`s0` is not near a local state at `p0` (Newton did not converge)."
        raise ValueError(msg)
    return _local_from(system, z0, direction, p_range, lower, upper, h_max, max_steps, typical)


def _local_from(system: _System, z0, direction, p_range, lower, upper, h_max, max_steps, typical=None) -> Branch:
    n, ns = system.n, int(system.slow.sum())
    span = float(p_range[1] - p_range[0])
    scale = _scale(z0, span, typical)
    lo = np.concatenate([np.full(n, -np.inf), np.full(ns, -np.inf) if lower is None else np.asarray(lower, float)])
    hi = np.concatenate([np.full(n, np.inf), np.full(ns, np.inf) if upper is None else np.asarray(upper, float)])
    if np.ndim(direction) == 0:
        d = np.zeros(n + ns + 1)
        d[-1] = float(direction)
    else:
        d = np.asarray(direction, dtype=float)
    tests = _local_tests(system)
    curve = _continue(system, z0, d, scale, _box_inside(p_range, lo, hi), tests, h_max=h_max, max_steps=max_steps)
    return _branch_from(system, curve, _points(system, curve, scale, tests))


def _switch(system: _System, bp: SpecialPoint, sign: int, offset: float):
    """A point on the local branch crossing the global one at ``bp``: Newton on the extended system plus
    ``phi . (s - u_slow) = sign * offset`` (``phi`` the null vector), in ``(u, s, p)``. None if it fails."""
    n, slow = system.n, system.slow
    phi = bp.direction
    z = np.concatenate([bp.state, bp.local + sign * offset * phi, [bp.parameter]])
    sel = np.zeros(z.size)
    sel[n:-1] = phi
    sel[np.flatnonzero(slow)] -= phi
    with np.errstate(all="ignore"):
        for _ in range(40):
            r = np.concatenate([system.fun(z), [sel @ z - sign * offset]])
            a = np.vstack([system.jac(z), sel])
            try:
                dz = np.linalg.solve(a, -r)
            except np.linalg.LinAlgError:
                return None
            if not np.all(np.isfinite(dz)):
                return None
            z = z + dz
            if np.max(np.abs(dz) / np.maximum(np.abs(z), 1e-8)) <= 1e-12:
                return z
    return None


# ---------------------------------------------------------------------------------------------------------
# The whole diagram


def reduced_diagram(
    family: Family,
    parameter: str,
    values: Sequence[float],
    hss: Sequence[np.ndarray | None],
    local_states: Sequence[Sequence[np.ndarray]],
    *,
    totals: np.ndarray | None = None,
    local_box: tuple[np.ndarray, np.ndarray] | None = None,
    h_max: float = 0.03,
) -> Diagram:
    """Global and local branches over the sweep range, seeded from point-wise results.

    Parameters
    ----------
    family : kinetics at a parameter value (with ``dparam``).
    parameter : the sweep parameter's name (for the record).
    values : the sweep values, ascending or descending.
    hss : the baseline HSS at each sweep value (None where lost); the first found seeds the global branch.
    local_states : the non-HSS local states found at each sweep value (``(n_slow,)`` arrays); any not on a
        branch continued so far seeds a new one (both ways).
    totals : conserved totals per conservation row (default ``W @`` the first HSS).
    local_box : ``(lower, upper)`` for the local states (default: no bound; continuation stops at the
        sweep range then).

    The global branch is continued from the first HSS across the range (through folds); at each of its
    spike branch points the local branch is started both ways by branch switching.
    """
    values = np.asarray(values, dtype=float)
    p_range = (float(values.min()), float(values.max()))
    first = next((k for k, u in enumerate(hss) if u is not None), None)
    if first is None:
        msg = "`hss` has no steady state to start from."
        raise ValueError(msg)
    u0 = np.asarray(hss[first], dtype=float)
    k0 = family(float(values[first]))
    slow = np.asarray(k0.slow, dtype=bool)
    w = np.asarray(k0.conservation, dtype=float).reshape(-1, k0.n)
    totals = w @ u0 if totals is None else np.asarray(totals, dtype=float)
    lower, upper = (None, None) if local_box is None else local_box
    # step: units of arclength, the largest sizes seen over the sweep
    typ_u = np.max(np.abs([u for u in hss if u is not None]), axis=0)
    seen = [np.abs(np.asarray(s, float)) for states in local_states for s in states] + [typ_u[slow]]
    typ = np.concatenate([typ_u, np.max(seen, axis=0)])
    # step: the global branch, from the first HSS, both ways (the first point is usually an end)
    ascending = values[-1] >= values[0]
    parts = [global_branch(family, u0, float(values[first]), p_range, totals=totals, direction=d, h_max=h_max,
                           typical=typ_u) for d in ((1, -1) if ascending else (-1, 1))]
    glob = _join(parts[1], parts[0])
    branches: list[Branch] = [glob]
    local_sys = _build(family, float(values[first]), totals, local=True)

    def grow(z0: np.ndarray, directions) -> None:
        halves = [_local_from(local_sys, z0, d, p_range, lower, upper, h_max, 1000, typ) for d in directions]
        branches.append(halves[0] if len(halves) == 1 else _join(halves[0], halves[1]))

    # step: branch switching at the spike branch points (unless a branch there is known already)
    span = p_range[1] - p_range[0]
    for bp in glob.points:
        if bp.kind != "branch" or bp.direction is None:
            continue
        start = np.concatenate([bp.state, bp.local, [bp.parameter]])
        offset = 1e-3 * float(np.max(typ[k0.n :]))
        for sign in (1, -1):
            z = _switch(local_sys, bp, sign, offset)
            if z is None or not (p_range[0] - 1e-9 * span <= z[-1] <= p_range[1] + 1e-9 * span):
                continue
            if _covered(local_sys, branches[1:], float(z[-1]), z[: k0.n], z[k0.n : -1]):
                continue
            grow(z, [z - start])
    # step: local states found at sweep points but on no branch yet seed their own
    for p, u, states in zip(values, hss, local_states):
        if u is None:
            continue
        for s in states:
            s = np.asarray(s, dtype=float)
            if _covered(local_sys, branches[1:], float(p), np.asarray(u, float), s):
                continue
            z0 = _newton_fixed_p(local_sys, np.concatenate([u, s, [p]]))
            if z0 is not None:
                grow(z0, (-1, 1))
    return Diagram(parameter=parameter, species=k0.species, slow=slow, branches=tuple(branches))


def _join(back: Branch, ahead: Branch) -> Branch:
    """One branch from two halves leaving the same start: ``back`` reversed, then ``ahead`` without its start."""

    def cat(a, b):
        return np.concatenate([a[::-1], b[1:]])

    pts = tuple(sorted(back.points + ahead.points, key=lambda pt: pt.parameter))
    return Branch(kind=ahead.kind, parameter=cat(back.parameter, ahead.parameter),
                  states=cat(back.states, ahead.states),
                  local=cat(back.local, ahead.local), stable=cat(back.stable, ahead.stable),
                  well_mixed_stable=cat(back.well_mixed_stable, ahead.well_mixed_stable),
                  growth=cat(back.growth, ahead.growth), points=pts)


def _covered(system: _System, branches: Sequence[Branch], p: float, u: np.ndarray, s: np.ndarray) -> bool:
    """Is the local state ``s`` at ``p`` (HSS ``u``) on one of ``branches``? Each segment that brackets ``p``
    gives an interpolated start, corrected at fixed ``p``, and the root is compared to ``s``."""
    tol = 1e-9 * max(float(np.max(np.abs(s))), float(np.max(np.abs(u))), 1e-12)
    for b in branches:
        x = b.parameter
        for i in np.flatnonzero((x[:-1] - p) * (x[1:] - p) <= 0):
            th = 0.0 if x[i + 1] == x[i] else (p - x[i]) / (x[i + 1] - x[i])
            guess = (1 - th) * b.local[i] + th * b.local[i + 1]
            if np.max(np.abs(guess - s)) > 0.05 * max(float(np.max(np.abs(s))), 1e-12) + 100 * tol:
                continue
            hs = (1 - th) * b.states[i] + th * b.states[i + 1]
            z = _newton_fixed_p(system, np.concatenate([hs, guess, [p]]))
            if z is not None and np.max(np.abs(z[system.n : -1] - s)) <= 1e2 * tol:
                return True
    return False


# ---------------------------------------------------------------------------------------------------------
# Thresholds along branches


@dataclass(frozen=True)
class ThresholdCurve:
    """Route-1 threshold along an unstable local branch: ``height`` of the local state above the HSS along
    the pulse direction ``sign * e`` at each ``parameter`` (positive where it is beyond the HSS), and
    ``off_ray``, its distance from that ray (0 for one slow species)."""

    parameter: np.ndarray
    height: np.ndarray
    off_ray: np.ndarray


def threshold_curves(diagram: Diagram, pulse: np.ndarray, sign: int = 1) -> tuple[ThresholdCurve, ...]:
    """The threshold as a continuous function of the parameter along every unstable stretch of the local
    branches. ``pulse`` is ``e`` over the slow species (1 on pulsed ones)."""
    e = sign * np.asarray(pulse, dtype=float)
    out = []
    for b in diagram.branches:
        if b.kind != "local":
            continue
        v = b.local - b.states[:, diagram.slow]
        h = v @ e / (e @ e)
        off = np.linalg.norm(v - h[:, None] * e, axis=1)
        bad = b.stable
        runs = np.split(np.arange(len(h)), np.flatnonzero(np.diff(bad.astype(int))) + 1)
        for r in runs:
            if len(r) > 1 and not bad[r[0]]:
                out.append(ThresholdCurve(parameter=b.parameter[r], height=h[r], off_ray=off[r]))
    return tuple(out)


# ---------------------------------------------------------------------------------------------------------
# Regime boundaries


@dataclass(frozen=True)
class Boundary:
    """Where the predicted regime changes between two sweep points.

    Attributes
    ----------
    parameter : the sweep parameter's name.
    value : where the regime changes.
    kind : the special point there (``"fold"``, ``"hopf"``, ``"branch"``), or ``"regime"`` where no special
        point explains the change and it was located by bisection on the point-wise regime.
    between : ``(regime below, regime above)`` in the sweep's order.
    branch : ``"global"`` or ``"local"``, the special point's; None for ``"regime"``.
    """

    parameter: str
    value: float
    kind: str
    between: tuple[str, str]
    branch: str | None

    def as_json(self) -> dict:
        """The `predict --json` entry."""
        return {"parameter": self.parameter, "value": float(self.value), "kind": self.kind,
                "between": list(self.between), "branch": self.branch}


def hss_near(diagram: Diagram, p: float, reference: np.ndarray) -> np.ndarray | None:
    """The HSS on the global branch at ``p`` nearest ``reference`` (interpolated between continued points;
    the caller corrects it), or None where the branch does not reach ``p``."""
    b = diagram.branches[0]
    x = b.parameter
    best, dist = None, np.inf
    for i in np.flatnonzero((x[:-1] - p) * (x[1:] - p) <= 0):
        th = 0.0 if x[i + 1] == x[i] else (p - x[i]) / (x[i + 1] - x[i])
        u = (1 - th) * b.states[i] + th * b.states[i + 1]
        d = float(np.max(np.abs(u - reference) / np.maximum(np.abs(reference), 1e-12)))
        if d < dist:
            best, dist = u, d
    return best


def regime_boundaries(
    diagram: Diagram,
    values: Sequence[float],
    regimes: Sequence[str],
    hss: Sequence[np.ndarray | None],
    regime_at: Callable[[float, np.ndarray], str],
    *,
    extra: Sequence[SpecialPoint] = (),
    xtol: float = 1e-10,
) -> list[Boundary]:
    """Every place between sweep points where the regime changes, at a special point where one explains it.

    In each gap between consecutive sweep values the special points of ``diagram`` inside it are tried: the
    regime (``regime_at(p, hss_guess)``, the point-wise analysis) is taken a quarter of the way to each one's
    neighbours (other special points or the gap's ends) on both sides; a change across a special point puts a
    boundary there (a special point on a sweep value belongs to the gap that ends there), a change anywhere
    else (or in a gap without special points) is located by bisection on ``regime_at`` to ``xtol`` of the
    sweep's span (``kind="regime"``). ``extra`` special points (cycle folds, say) are tried as well.
    """
    values = np.asarray(values, dtype=float)
    span = float(np.ptp(values)) or 1.0
    special = sorted([*diagram.points, *extra], key=lambda pt: pt.parameter)
    out: list[Boundary] = []
    for k in range(len(values) - 1):
        a, b = float(values[k]), float(values[k + 1])
        lo, hi = min(a, b), max(a, b)
        ref = hss[k] if hss[k] is not None else hss[k + 1]
        tol = 1e-9 * span
        cands = [pt for pt in special if lo - tol <= pt.parameter <= hi + tol and abs(pt.parameter - a) > tol]
        cands.sort(key=lambda pt: pt.parameter if b > a else -pt.parameter)
        at_end = next((pt for pt in cands if abs(pt.parameter - b) <= tol), None)  # on the sweep point b
        merged: list[SpecialPoint] = []
        for pt in cands:  # two kinds at one place: one boundary (the first kind found)
            if abs(pt.parameter - b) > tol and (not merged or abs(pt.parameter - merged[-1].parameter) > tol):
                merged.append(pt)
        if (not merged and at_end is None and regimes[k] == regimes[k + 1]) or ref is None:
            if ref is None and regimes[k] != regimes[k + 1] and len(merged) == 1:
                pt = merged[0]
                out.append(Boundary(diagram.parameter, pt.parameter, pt.kind, (regimes[k], regimes[k + 1]),
                                    pt.branch))
            continue

        def at(p: float, ref=ref) -> str:
            guess = hss_near(diagram, p, ref)
            return regime_at(p, ref if guess is None else guess)

        # step: test points around each special point, in the sweep's order, with their regimes
        places = [a] + [pt.parameter for pt in merged] + [b]
        tests: list[tuple[float, str, SpecialPoint | None]] = [(a, regimes[k], None)]
        for i, pt in enumerate(merged, start=1):
            before = pt.parameter - 0.25 * (pt.parameter - places[i - 1])
            after = pt.parameter + 0.25 * (places[i + 1] - pt.parameter)
            tests += [(before, at(before), None), (after, at(after), pt)]
        tests.append((b, regimes[k + 1], at_end))
        for (p0, r0, _), (p1, r1, pt) in zip(tests[:-1], tests[1:]):
            if r0 == r1:
                continue
            if pt is not None:
                out.append(Boundary(diagram.parameter, pt.parameter, pt.kind, (r0, r1), pt.branch))
                continue
            # step: bisection on the regime between two test points with no special point between them
            while abs(p1 - p0) > xtol * span:
                mid = 0.5 * (p0 + p1)
                rm = at(mid)
                if rm == r0:
                    p0 = mid
                else:
                    p1, r1 = mid, rm
            out.append(Boundary(diagram.parameter, 0.5 * (p0 + p1), "regime", (r0, r1), None))
    return out


# ---------------------------------------------------------------------------------------------------------
# The two-parameter picture


def critical_ratio_curve(
    family: Family,
    branch: Branch,
    shape: str | None = None,
    size: float | tuple[float, ...] | None = None,
    near: Sequence[float] = (),
) -> tuple[np.ndarray, np.ndarray]:
    """The linear (Turing) boundary in the plane (sweep parameter, ``rho = max(D_slow) / min(D_fast)``):
    :func:`harness.linear.critical_ratio` at every continued point of the global ``branch`` and, for each
    value in ``near`` (spike-limit boundaries, say), at points ``1e-2 ... 1e-4`` of the branch's span either
    side (HSS interpolated and corrected by Newton); NaN where no ratio in ``[1e-12, 1]`` destabilises the
    HSS. As ``rho -> 0`` it meets the spike-limit boundaries, where the local block at a well-mixed-stable
    HSS turns unstable. Returns ``(parameter, ratio)`` sorted by parameter (a branch with a fold folds here).
    """
    from .linear import critical_ratio

    k0 = family(float(branch.parameter[0]))
    w = np.asarray(k0.conservation, dtype=float).reshape(-1, k0.n)
    system = _build(family, float(branch.parameter[0]), w @ branch.states[0], local=False)
    span = float(np.ptp(branch.parameter)) or 1.0
    pairs = list(zip(branch.parameter, branch.states))
    offsets = span * np.array([1e-2, 3e-3, 1e-3, 3e-4, 1e-4])
    diag = Diagram(parameter="", species=k0.species, slow=np.asarray(k0.slow, bool), branches=(branch,))
    for b in near:
        for p in np.concatenate([b - offsets, b + offsets]):
            u = hss_near(diag, float(p), branch.states[int(np.argmin(np.abs(branch.parameter - b)))])
            z = None if u is None else _newton_fixed_p(system, np.concatenate([u, [p]]))
            if z is not None:
                pairs.append((float(p), z[:-1]))
    pairs.sort(key=lambda pu: pu[0])
    ratio = np.full(len(pairs), np.nan)
    for i, (p, u) in enumerate(pairs):
        r = critical_ratio(family(float(p)), u, shape, size)
        ratio[i] = np.nan if r is None else r
    return np.array([p for p, _ in pairs]), ratio
