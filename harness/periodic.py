"""Periodic orbits born at Hopf points, continued by shooting, with Floquet multipliers and cycle folds.

An orbit of ``x' = g(x, p)`` with period ``T`` is a zero of the shooting residual
``[Q.T (phi_T(x0; p) - x0); W x0 - totals; g(x_ref) . (x0 - x_ref)]`` in ``(x0, T, p)``: the flow map
``phi`` comes from ``solve_ivp`` (DOP853, rtol 1e-10) together with the variational equations, which give
the monodromy matrix ``M = d phi / d x0`` and ``d phi / d p``; conservation rows ``W`` replace as many
equations as there are laws, and the last row is a Poincare-type phase condition through the previous
orbit's ``x_ref``. The family leaves the Hopf point from ``x_h + eps Re(q)``, ``T = 2 pi / omega``
(``q`` the critical eigenvector), continues by pseudo-arclength (secant predictor, the phase reference
moved to each accepted orbit) and stops when the parameter leaves its range, the period grows twentyfold
(towards a homoclinic orbit), the orbit shrinks back to a point, or after ``max_steps``. Floquet
multipliers are the eigenvalues of ``Q.T M Q`` (the conserved directions' unit multipliers left out); the
one nearest 1 is the phase's, and the orbit is stable when every other lies inside the unit circle.
Cycle folds are sign changes of the parameter component of the tangent, located by brentq on the secant.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy.integrate import solve_ivp

from .continuation import Diagram, Family, SpecialPoint, _cached, _correct, _Curve, _locate, _tangent, hss_near
from .kinetics import conserved_basis

__all__ = [
    "CycleFamily",
    "VectorField",
    "cycle_fold_points",
    "cycles_from_hopf",
    "diagram_cycles",
    "global_field",
    "local_field",
]


@dataclass(frozen=True)
class VectorField:
    """``x' = rhs(x, p)`` with ``jac = d rhs / d x (d, d)``, ``dparam = d rhs / d p (d,)`` and conservation rows."""

    rhs: Callable[[np.ndarray, float], np.ndarray]
    jac: Callable[[np.ndarray, float], np.ndarray]
    dparam: Callable[[np.ndarray, float], np.ndarray]
    conservation: np.ndarray


@dataclass(frozen=True)
class CycleFamily:
    """A family of periodic orbits, in continuation order.

    Attributes
    ----------
    branch : ``"global"`` (well-mixed) or ``"local"`` (the local dynamics at the HSS).
    parameter, period : ``(m,)``.
    start : ``(m, d)`` a point on each orbit.
    maxima, minima : ``(m, d)`` the largest / least value of each variable over the orbit.
    multipliers : ``(m, d - c - 1)`` nontrivial Floquet multipliers (phase and conserved ones left out).
    stable : ``(m,)`` every nontrivial multiplier inside the unit circle.
    folds : parameter values of the cycle folds found.
    hopf : the Hopf point it was born at.
    reason : why the continuation stopped.
    """

    branch: str
    parameter: np.ndarray
    period: np.ndarray
    start: np.ndarray
    maxima: np.ndarray
    minima: np.ndarray
    multipliers: np.ndarray
    stable: np.ndarray
    folds: tuple[float, ...]
    hopf: SpecialPoint | None
    reason: str


# ---------------------------------------------------------------------------------------------------------
# Vector fields of the reduced system


def global_field(family: Family) -> VectorField:
    """The well-mixed system ``u' = f(u, p)`` (its totals are fixed by the shooting residual)."""
    family = _cached(family)

    def rhs(u, p):
        return family(p).f(u)

    def jac(u, p):
        return family(p).jac(u)

    def dparam(u, p):
        return family(p).dparam(u[:, None])[:, 0]

    kin = family(0.0)
    return VectorField(rhs, jac, dparam, np.asarray(kin.conservation, float).reshape(-1, kin.n))


def local_field(family: Family, diagram: Diagram) -> VectorField:
    """The local dynamics ``s' = f_slow(s, u_fast*(p), p)``, ``u*(p)`` the HSS on the diagram's global branch
    (corrected by Newton at each ``p``); ``dparam`` includes ``J_sf du_fast*/dp`` from the implicit function."""
    family = _cached(family)
    slow = np.asarray(diagram.slow, dtype=bool)
    glob = diagram.branches[0]
    ref = glob.states[len(glob.states) // 2]
    cache: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def hss(p: float):
        if p not in cache:
            if len(cache) > 64:
                cache.clear()
            kin = family(p)
            w = np.asarray(kin.conservation, float).reshape(-1, kin.n)
            u = hss_near(diagram, p, ref)
            u = ref.copy() if u is None else u
            t = w @ u
            q = conserved_basis(w, kin.n)
            for _ in range(30):
                res = np.concatenate([q.T @ kin.f(u), w @ u - t])
                a = np.vstack([q.T @ kin.jac(u), w])
                du = np.linalg.solve(a, -res)
                u = u + du
                if np.max(np.abs(du)) <= 1e-14 * max(1.0, float(np.max(np.abs(u)))):
                    break
            a = np.vstack([q.T @ kin.jac(u), w])
            dudp = np.linalg.solve(a, -np.concatenate([q.T @ kin.dparam(u[:, None])[:, 0], np.zeros(w.shape[0])]))
            cache[p] = (u, dudp)
        return cache[p]

    def full(s, p):
        u, dudp = hss(p)
        v = u.copy()
        v[slow] = s
        return v, dudp

    def rhs(s, p):
        v, _ = full(s, p)
        return family(p).f(v)[slow]

    def jac(s, p):
        v, _ = full(s, p)
        return family(p).jac(v)[np.ix_(slow, slow)]

    def dparam(s, p):
        v, dudp = full(s, p)
        kin = family(p)
        jm = kin.jac(v)
        return kin.dparam(v[:, None])[:, 0][slow] + jm[np.ix_(slow, ~slow)] @ dudp[~slow]

    return VectorField(rhs, jac, dparam, np.zeros((0, int(slow.sum()))))


# ---------------------------------------------------------------------------------------------------------
# Shooting


@dataclass(frozen=True)
class _Flow:
    end: np.ndarray
    monodromy: np.ndarray
    dp: np.ndarray
    samples: np.ndarray  # (d, k) points along the orbit


def _flow(
    field: VectorField, x0: np.ndarray, period: float, p: float, samples: int = 0, rtol: float = 1e-10
) -> _Flow | None:
    """Flow map, monodromy and parameter sensitivity over ``[0, period]`` (variational equations)."""
    d = x0.size

    def rhs(t, y):
        x = y[:d]
        jm = field.jac(x, p)
        m = y[d : d + d * d].reshape(d, d)
        return np.concatenate([field.rhs(x, p), (jm @ m).ravel(), jm @ y[d + d * d :] + field.dparam(x, p)])

    y0 = np.concatenate([x0, np.eye(d).ravel(), np.zeros(d)])
    scale = max(1.0, float(np.max(np.abs(x0))))
    t_eval = np.linspace(0.0, period, samples) if samples else None
    with np.errstate(all="ignore"):
        sol = solve_ivp(rhs, (0.0, period), y0, method="DOP853", rtol=rtol, atol=1e-2 * rtol * scale, t_eval=t_eval)
    if sol.status != 0 or not np.all(np.isfinite(sol.y[:, -1])):
        return None
    y = sol.y[:, -1]
    return _Flow(y[:d], y[d : d + d * d].reshape(d, d), y[d + d * d :], sol.y[:d] if samples else np.zeros((d, 0)))


@dataclass(frozen=True)
class _Shooting:
    """The shooting residual in ``z = (x0, T, p)`` with a fixed phase reference (a `_System` look-alike)."""

    field: VectorField
    totals: np.ndarray
    x_ref: np.ndarray
    g_ref: np.ndarray
    extra: Callable[[np.ndarray], tuple[float, np.ndarray]] | None = None
    samples: int = 0
    rtol: float = 1e-10
    memo: dict = field(default_factory=dict)

    def flow(self, z: np.ndarray) -> _Flow | None:
        """The flow at ``z``, remembered for the last point (residual and Jacobian share it)."""
        key = z.tobytes()
        if key not in self.memo:
            d = z.size - 2
            self.memo.clear()
            period, p = float(z[d]), float(z[-1])
            self.memo[key] = _flow(self.field, z[:d], period, p, self.samples, self.rtol) if period > 0 else None
        return self.memo[key]

    def parts(self, z: np.ndarray):
        d = z.size - 2
        x0, p = z[:d], float(z[-1])
        w = self.field.conservation
        q = conserved_basis(w, d) if w.shape[0] else np.eye(d)
        fl = self.flow(z)
        if fl is None:
            msg = "the flow failed"
            raise np.linalg.LinAlgError(msg)
        res = np.concatenate([q.T @ (fl.end - x0), w @ x0 - self.totals, [self.g_ref @ (x0 - self.x_ref)]])
        top = np.hstack([q.T @ (fl.monodromy - np.eye(d)), (q.T @ self.field.rhs(fl.end, p))[:, None],
                         (q.T @ fl.dp)[:, None]])
        mid = np.hstack([w, np.zeros((w.shape[0], 2))])
        bottom = np.concatenate([self.g_ref, [0.0, 0.0]])[None, :]
        jac = np.vstack([top, mid, bottom])
        if self.extra is not None:
            r, row = self.extra(z)
            res, jac = np.concatenate([res, [r]]), np.vstack([jac, row])
        return res, jac

    def fun(self, z):
        return self.parts(z)[0]

    def jac(self, z):
        return self.parts(z)[1]


def _shooting(vf: VectorField, totals: np.ndarray, z: np.ndarray, extra=None, samples: int = 0,
              rtol: float = 1e-10) -> _Shooting:
    d = z.size - 2
    x = z[:d].copy()
    return _Shooting(vf, totals, x, vf.rhs(x, float(z[-1])), extra, samples, rtol)


def _newton(system: _Shooting, z: np.ndarray, tol: float = 1e-11, max_iter: int = 15) -> np.ndarray | None:
    """Newton on a square shooting system (with its extra row)."""
    z = z.copy()
    for _ in range(max_iter):
        try:
            res, jac = system.parts(z)
            dz = np.linalg.solve(jac, -res)
        except np.linalg.LinAlgError:
            return None
        if not np.all(np.isfinite(dz)):
            return None
        z = z + dz
        if np.max(np.abs(dz) / (np.abs(z) + 1e-3 * np.max(np.abs(z)))) <= tol:
            return z
    return None


def _orbit_extrema(samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Largest and least values of each row of samples over one period, refined by a parabola through the
    extreme sample and its neighbours (the samples wrap around)."""

    def refine(v: np.ndarray, sign: float) -> float:
        v = sign * v[:-1]  # the last sample repeats the first
        i = int(np.argmax(v))
        a, b, c = v[i - 1], v[i], v[(i + 1) % v.size]
        curv = a - 2 * b + c
        top = b - 0.125 * (a - c) ** 2 / curv if curv < 0 else b
        return sign * top

    return (np.array([refine(r, 1.0) for r in samples]), np.array([refine(r, -1.0) for r in samples]))


def _multipliers(field: VectorField, monodromy: np.ndarray) -> np.ndarray:
    d = monodromy.shape[0]
    w = field.conservation
    q = conserved_basis(w, d) if w.shape[0] else np.eye(d)
    mu = np.linalg.eigvals(q.T @ monodromy @ q)
    phase = int(np.argmin(np.abs(mu - 1.0)))
    return np.delete(mu, phase)


def cycles_from_hopf(
    field: VectorField,
    hopf: SpecialPoint | None,
    x_h: np.ndarray,
    p_h: float,
    omega: float,
    p_range: tuple[float, float],
    *,
    branch: str = "global",
    amplitude: float | None = None,
    h_max: float = 0.2,
    max_steps: int = 40,
    samples: int = 256,
    rtol: float = 1e-10,
) -> CycleFamily | None:
    """The family of periodic orbits born at the Hopf point ``(x_h, p_h)`` of angular frequency ``omega``.

    ``amplitude`` is that of the first orbit (default 1e-3 of ``max(|x_h|, 1)``); ``samples`` points per
    orbit give its extrema; ``rtol`` is the integration's (Newton stops at ``100 rtol`` in scaled units).
    Returns None if not even the first orbit converges.
    """
    x_h = np.asarray(x_h, dtype=float)
    d = x_h.size
    w = field.conservation
    totals = w @ x_h
    lam, vec = np.linalg.eig(field.jac(x_h, p_h))
    k = int(np.argmin(np.abs(lam - 1j * omega)))
    qr = vec[:, k].real if np.linalg.norm(vec[:, k].real) > 1e-8 else vec[:, k].imag
    qr = qr / np.linalg.norm(qr)
    eps = 1e-3 * max(float(np.max(np.abs(x_h))), 1.0) if amplitude is None else amplitude
    period0 = 2 * np.pi / omega

    def first(e: float) -> np.ndarray | None:  # an orbit of amplitude e along Re(q): the extra row fixes it
        def extra(z, e=e):
            row = np.concatenate([qr, [0.0, 0.0]])
            return float(qr @ (z[:d] - x_h) - e), row

        z = np.concatenate([x_h + e * qr, [period0, p_h]])
        return _newton(_shooting(field, totals, z, extra, rtol=rtol), z, tol=max(1e-11, 0.1 * rtol))

    za, zb = first(eps), first(2 * eps)
    if za is None or zb is None:
        return None
    span = float(p_range[1] - p_range[0])
    # units: the state's size, or sqrt(span) for a state at 0 (a Hopf orbit's radius grows like sqrt(p - p_h))
    scale = np.concatenate([np.full(d, max(float(np.max(np.abs(x_h))), np.sqrt(span))), [period0, span]])
    zs, ts = [za, zb], []
    t = (zb - za) / scale
    t /= np.linalg.norm(t)
    ts = [t, t]
    h, reason, folds, fresh = 0.02, f"stopped after {max_steps} steps", [], True
    flows: list[_Flow | None] = [_flow(field, z[:d], float(z[d]), float(z[-1]), samples + 1, rtol) for z in zs]
    for _ in range(max_steps):
        y = zs[-1] / scale
        sysm = _shooting(field, totals, zs[-1], samples=samples + 1, rtol=rtol)

        def fun(v, s=sysm):
            return s.fun(v * scale)

        def jac(v, s=sysm):
            return s.jac(v * scale) * scale

        try:
            if fresh:  # the tangent under this step's phase reference (it moved with the last orbit)
                t = _tangent(jac(y), t)
                fresh = False
            y_new, iters = _correct(fun, jac, y + h * t, t, tol=100 * rtol, max_iter=8)
            t_new = None if y_new is None else _tangent(jac(y_new), t)
        except np.linalg.LinAlgError:
            y_new, t_new = None, None
        if y_new is None or t_new is None or t_new @ t < 0.8:
            h /= 2
            if h < 1e-6:
                reason = "the step fell below 1e-6"
                break
            continue
        z_new = y_new * scale
        fresh = True
        flows.append(sysm.flow(z_new))  # computed for the tangent just now
        zs.append(z_new)
        ts.append(t_new)
        t = t_new
        if iters <= 3:
            h = min(1.5 * h, h_max)
        if not p_range[0] - 1e-9 * span <= z_new[-1] <= p_range[1] + 1e-9 * span:
            reason = "the parameter left its range"
            break
        if z_new[d] > 20 * period0:
            reason = "the period grew twentyfold (towards a homoclinic orbit)"
            break
        if np.max(np.abs(z_new[:d] - x_h)) < 0.1 * eps and len(zs) > 4:
            reason = "the orbit shrank to a point"
            break
    # step: orbit data, multipliers, and the cycle folds (tangent's parameter component changes sign)
    zs_arr = np.array(zs)
    tp = np.array([tt[-1] for tt in ts])
    for i in np.flatnonzero(np.sign(tp[:-1]) * np.sign(tp[1:]) < 0):
        sysm = _shooting(field, totals, zs_arr[i], rtol=rtol)
        curve = _Curve(z=zs_arr, t=np.array(ts), tests={})
        try:
            found = _locate(sysm, curve, scale, int(i), lambda z, tt, jz: float(tt[-1]), tol=10 * rtol)
        except np.linalg.LinAlgError:
            found = None
        if found is not None:
            folds.append(float(found[0][-1]))
    maxima, minima, mults, stable = [], [], [], []
    for fl in flows:
        if fl is None:
            maxima.append(np.full(d, np.nan))
            minima.append(np.full(d, np.nan))
            mults.append(np.full(max(d - w.shape[0] - 1, 0), np.nan + 0j))
            stable.append(False)
            continue
        hi, lo = _orbit_extrema(fl.samples)
        maxima.append(hi)
        minima.append(lo)
        mu = _multipliers(field, fl.monodromy)
        mults.append(mu)
        stable.append(bool(np.all(np.abs(mu) < 1)))
    return CycleFamily(branch=branch, parameter=zs_arr[:, -1], period=zs_arr[:, d], start=zs_arr[:, :d],
                       maxima=np.array(maxima), minima=np.array(minima), multipliers=np.array(mults),
                       stable=np.array(stable), folds=tuple(folds), hopf=hopf, reason=reason)


def cycle_fold_points(families: tuple[CycleFamily, ...]) -> tuple[SpecialPoint, ...]:
    """The cycle folds of ``families`` as special points (``kind="cycle-fold"``; ``state`` and ``local`` hold
    the orbit point nearest the fold, in the family's own variables)."""
    out = []
    for fam in families:
        for p in fam.folds:
            x = fam.start[int(np.argmin(np.abs(fam.parameter - p)))]
            out.append(SpecialPoint("cycle-fold", fam.branch, float(p), x.copy(), x.copy()))
    return tuple(out)


def diagram_cycles(
    family: Family, diagram: Diagram, p_range: tuple[float, float], *, branches: tuple[str, ...] = ("global", "local"),
    **kwargs,
) -> tuple[CycleFamily, ...]:
    """A family of orbits from every Hopf point of the diagram on the given ``branches``: well-mixed ones in
    the full system, local ones in the local dynamics (``kwargs`` go to :func:`cycles_from_hopf`). A Hopf
    point where an earlier family shrank back to a point is not started again."""
    out: list[CycleFamily] = []
    glob, loc = global_field(family), None
    span = p_range[1] - p_range[0]
    for pt in diagram.points:
        if pt.kind != "hopf" or pt.frequency is None or pt.branch not in branches:
            continue
        if any(f.branch == pt.branch and f.reason.startswith("the orbit shrank")
               and abs(f.parameter[-1] - pt.parameter) <= 1e-3 * span for f in out):
            continue
        if pt.branch == "global":
            fam = cycles_from_hopf(glob, pt, pt.state, pt.parameter, pt.frequency, p_range, branch="global",
                                   **kwargs)
        else:
            loc = local_field(family, diagram) if loc is None else loc
            fam = cycles_from_hopf(loc, pt, pt.local, pt.parameter, pt.frequency, p_range, branch="local",
                                   **kwargs)
        if fam is not None:
            out.append(fam)
    return tuple(out)
