"""Homogeneous steady states of the well-mixed system: all of them in a box, and one followed along a sweep.

The well-mixed system is ``du/dt = f(u)``. With ``c`` conservation rows ``W`` (``W @ f == 0`` identically)
the ``n`` equations ``f = 0`` are dependent, so they are replaced by the ``n - c`` independent combinations
``Q.T @ f = 0`` (``Q`` an orthonormal basis of the null space of ``W``) plus the ``c`` totals ``W @ u = T``.
Because ``f`` lies in that null space, ``Q.T @ f = 0`` holds exactly when ``f = 0``.

All roots in a box come from multi-start Newton (scrambled Sobol starts, seeded, so deterministic) with
deflation (Farrell, Birkisson & Funke 2015, "Deflation techniques for finding distinct solutions of
nonlinear partial differential equations", SIAM J. Sci. Comput. 37(4)): each round repeats Newton from
every start on the deflated residual ``m(x) G(x)``, ``m(x) = prod_i (||x - r_i||^-p + shift)``, which
pushes the iteration away from the roots ``r_i`` found so far, until a round finds nothing new.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.optimize import linprog
from scipy.stats import qmc

from .kinetics import Kinetics, conserved_basis, reduced_eigenvalues

__all__ = [
    "BaselineTrace",
    "Equilibrium",
    "all_roots",
    "baseline_hss",
    "default_box",
    "equilibrium",
    "find_hss",
    "follow_baseline",
    "sobol",
    "trace_baseline",
]

Residual = Callable[[np.ndarray], np.ndarray]
"""``x (d, m) -> G (d, m)``, vectorised over ``m`` points."""


@dataclass(frozen=True)
class Equilibrium:
    """A homogeneous steady state.

    Attributes
    ----------
    state : ``(n,)`` concentrations, in species order.
    eigenvalues : eigenvalues of the well-mixed Jacobian, the conserved directions' zeros left out.
    stable : every eigenvalue has a negative real part.
    residual : ``max(|f(state)|, |W @ state - T|)``, the largest entry (``T`` where totals are known).
    """

    state: np.ndarray
    eigenvalues: np.ndarray
    stable: bool
    residual: float


@dataclass(frozen=True)
class BaselineTrace:
    """The baseline HSS along a sweep: ``states[k]`` is None where it was lost, with ``reasons[k]`` why."""

    states: tuple[Equilibrium | None, ...]
    reasons: tuple[str | None, ...]


def default_box(guess: np.ndarray, *, factor: float = 10.0) -> tuple[np.ndarray, np.ndarray]:
    """Region of interest ``[0, factor * max(|guess_i|, 1)]`` for each species.

    Concentrations are nonnegative, so the lower corner is 0; the upper corner leaves a decade of room
    above the guess (and at least ``factor`` for species guessed near zero). A species guessed negative
    (a shifted variable, not a concentration) gets the mirror image ``[-factor * |guess_i|, 0]``.
    """
    guess = np.asarray(guess, dtype=float)
    reach = factor * np.maximum(np.abs(guess), 1.0)
    neg = guess < 0
    return np.where(neg, -reach, 0.0), np.where(neg, 0.0, reach)


def equilibrium(kin: Kinetics, state: np.ndarray, totals: np.ndarray | None = None) -> Equilibrium:
    """Wrap a steady state with its reduced eigenvalues, stability and residual.

    ``totals`` (one per row of ``kin.conservation``), if given, enter the residual.
    """
    state = np.asarray(state, dtype=float)
    w = np.asarray(kin.conservation, dtype=float).reshape(-1, kin.n)
    res = float(np.max(np.abs(kin.f(state)), initial=0.0))
    if totals is not None and w.shape[0]:
        res = max(res, float(np.max(np.abs(w @ state - np.asarray(totals, dtype=float)))))
    eig = reduced_eigenvalues(kin.jac(state), w)
    return Equilibrium(state=state, eigenvalues=eig, stable=bool(np.all(eig.real < 0)), residual=res)


def find_hss(
    kin: Kinetics,
    totals: np.ndarray | Sequence[float] | None,
    lower: np.ndarray | Sequence[float],
    upper: np.ndarray | Sequence[float],
    *,
    starts: int = 64,
    seed: int = 0,
    extra_starts: np.ndarray | None = None,
    max_rounds: int = 8,
) -> list[Equilibrium]:
    """All homogeneous steady states with ``W @ u = totals`` inside the box ``[lower, upper]``.

    Parameters
    ----------
    kin : the kinetics.
    totals : ``(c,)`` conserved totals, one per row of ``kin.conservation`` (None or empty if none).
    lower, upper : ``(n,)`` corners of the region of interest.
    starts : number of quasi-random starts (rounded up to a power of 2, as Sobol points need).
    seed : seed of the scrambled Sobol sequence; the result is deterministic for a given seed.
    extra_starts : ``(n, k)`` further starts (e.g. the case's guess).
    max_rounds : most deflation rounds.

    Returns
    -------
    The steady states sorted by their first species, then the next.
    """
    lower, upper = _box(lower, upper, kin.n, "lower", "upper")
    w = _conservation(kin)
    t = _totals(kin, totals)
    x0 = _constrained_starts(w, t, lower, upper, starts, seed)
    if x0 is None:
        return []
    if extra_starts is not None:
        x0 = np.hstack([np.asarray(extra_starts, dtype=float).reshape(kin.n, -1), x0])
    fun, jac = _augmented(kin, w, t)
    roots = all_roots(fun, jac, lower, upper, starts=x0, max_rounds=max_rounds)
    raw = None if totals is None else np.asarray(totals, dtype=float)
    found = [equilibrium(kin, r, raw) for r in roots]
    return sorted(found, key=lambda e: tuple(e.state))


def baseline_hss(
    kin: Kinetics,
    guess: np.ndarray | Sequence[float],
    totals: np.ndarray | Sequence[float] | None = None,
    *,
    lower: np.ndarray | None = None,
    upper: np.ndarray | None = None,
) -> Equilibrium | None:
    """The HSS nearest the guess: Newton from the guess, else the nearest of :func:`find_hss` (None if none).

    ``totals`` default to ``W @ guess``; the box defaults to :func:`default_box` of the guess.
    """
    guess = np.asarray(guess, dtype=float)
    if guess.shape != (kin.n,):
        msg = f"`guess` must have shape ({kin.n},), got {guess.shape}."
        raise ValueError(msg)
    w = _conservation(kin)
    t = w @ guess if totals is None else _totals(kin, totals)
    box_lo, box_hi = default_box(guess)
    lower = box_lo if lower is None else np.asarray(lower, dtype=float)
    upper = box_hi if upper is None else np.asarray(upper, dtype=float)
    fun, jac = _augmented(kin, w, t)
    width = upper - lower
    x, ok = _newton(fun, jac, guess[:, None], np.empty((0, kin.n)), width)
    raw = np.asarray(kin.conservation, dtype=float).reshape(-1, kin.n) @ guess if totals is None else totals
    if ok[0] and _inside(x[:, 0], lower, upper):
        return equilibrium(kin, x[:, 0], raw)
    found = find_hss(kin, raw, lower, upper, extra_starts=guess[:, None])
    if not found:
        return None
    return min(found, key=lambda e: float(np.max(np.abs(e.state - guess) / width)))


def follow_baseline(
    kinetics: Sequence[Kinetics],
    guess: np.ndarray | Sequence[float],
    values: Sequence[float] | None = None,
) -> list[Equilibrium | None]:
    """The baseline HSS along a sweep, followed point to point; None where lost (see `trace_baseline`)."""
    return list(trace_baseline(kinetics, guess, values).states)


def trace_baseline(
    kinetics: Sequence[Kinetics],
    guess: np.ndarray | Sequence[float],
    values: Sequence[float] | None = None,
) -> BaselineTrace:
    """Follow the baseline HSS along a sweep (one Kinetics per point, in order), with reasons for losses.

    The first point takes :func:`baseline_hss`. Each later point starts Newton from a secant predictor
    through the two previous states (``values`` are the sweep values, for the secant; equal spacing if
    None), and accepts the root only if plain Newton contracts from there (each step at most half the one
    before, the first at most a quarter of the state's scale), which keeps it on the branch. Otherwise it
    walks the homotopy ``(1 - s) G_prev + s G_next`` from the previous state with halving steps in ``s``;
    if that stalls (a fold or the end of the branch between the two points) the point is lost. After a
    loss the next points keep trying from the last state found. Totals are ``W @ guess`` at every point.
    """
    guess = np.asarray(guess, dtype=float)
    x = np.arange(len(kinetics), dtype=float) if values is None else np.asarray(values, dtype=float)
    if x.shape != (len(kinetics),):
        msg = f"`values` must have one entry per kinetics ({len(kinetics)}), got {x.shape}."
        raise ValueError(msg)
    states: list[Equilibrium | None] = []
    reasons: list[str | None] = []
    history: list[tuple[int, np.ndarray]] = []  # (index, state) of the points found so far
    for k, kin in enumerate(kinetics):
        t = np.asarray(kin.conservation, dtype=float).reshape(-1, kin.n) @ guess
        if not history:
            eq = baseline_hss(kin, guess)
            reason = None if eq is not None else "no steady state found near the guess"
        else:
            j, prev = history[-1]
            pred = prev
            if len(history) > 1 and history[-2][0] == j - 1 and j == k - 1:
                i, prev2 = history[-2]
                pred = prev + (prev - prev2) * (x[k] - x[j]) / (x[j] - x[i])
            root = _continue(kinetics[j], kin, guess, prev, pred)
            eq = None if root is None else equilibrium(kin, root, t)
            reason = None
            if eq is None:
                reason = (
                    f"branch lost between sweep points {j} and {k}: Newton does not contract near the "
                    "predicted state (a fold or the end of the branch)"
                )
        states.append(eq)
        reasons.append(reason)
        if eq is not None:
            history.append((k, eq.state))
    return BaselineTrace(states=tuple(states), reasons=tuple(reasons))


def all_roots(
    fun: Residual,
    jac: Callable[[np.ndarray], np.ndarray],
    lower: np.ndarray,
    upper: np.ndarray,
    *,
    starts: np.ndarray,
    known: np.ndarray | None = None,
    max_rounds: int = 8,
    power: float = 2.0,
    shift: float = 1.0,
) -> np.ndarray:
    """Distinct roots of ``fun`` inside ``[lower, upper]`` by multi-start Newton with deflation.

    Parameters
    ----------
    fun, jac : ``x (d, m) -> (d, m)`` and ``x (d, m) -> (d, d, m)``, vectorised over points.
    lower, upper : ``(d,)`` box; distances are measured in units of its width.
    starts : ``(d, m)`` starting points.
    known : ``(k, d)`` roots known beforehand: deflated from the first round and returned first.
    max_rounds : most rounds; each runs Newton with all roots found so far deflated, the first from every
        start, later ones from the first quarter of them (at least 16) and from points between pairs of
        roots found.
    power, shift : the deflation operator's ``p`` and ``shift`` (Farrell et al. 2015 use 2 and 1).

    Returns
    -------
    ``(r, d)`` roots, the known ones first.
    """
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    width = np.where(upper > lower, upper - lower, 1.0)
    d = lower.size
    roots = np.empty((0, d)) if known is None else np.asarray(known, dtype=float).reshape(-1, d)
    for k in range(max_rounds):
        # step: the first round runs every start; later ones (deflated) the first quarter (at least 16)
        # and points between pairs of roots found, where a saddle between two attractors tends to lie
        x0 = starts if k == 0 else np.hstack([_between(roots), starts[:, : max(16, starts.shape[1] // 4)]])
        x, ok = _newton(fun, jac, x0, roots, width, power=power, shift=shift, centre=(lower + upper) / 2)
        new = [xi for xi, oki in zip(x.T, ok) if oki and _inside(xi, lower, upper)]
        fresh = _distinct(new, roots, width)
        if not fresh:
            break
        polished, ok = _newton(fun, jac, np.array(fresh).T, np.empty((0, d)), width)
        fresh = _distinct([p for p, o in zip(polished.T, ok) if o], roots, width)
        if not fresh:
            break
        roots = np.vstack([roots, fresh])
    return roots


# ---------------------------------------------------------------------------------------------------------
# Newton machinery


def _newton(
    fun: Residual,
    jac: Callable[[np.ndarray], np.ndarray],
    x0: np.ndarray,
    deflated: np.ndarray,
    width: np.ndarray,
    *,
    power: float = 2.0,
    shift: float = 1.0,
    max_iter: int = 40,
    xtol: float = 1e-12,
    ftol: float = 1e-8,
    centre: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Damped Newton from every column of ``x0`` at once, on the residual deflated at ``deflated``.

    The deflated step is the plain step ``d0`` scaled by ``1 / (1 - grad(log m) . d0)`` (Sherman-Morrison
    on ``J_H = m J + G grad(m)^T``); a backtracking line search halves it until the deflated residual's
    norm decreases; a point where it never does, or that strays a box width outside the box around
    ``centre`` (default: the starts' mean), is given up. Returns the final points and which converged
    (plain step below ``xtol`` in box widths, residual below ``ftol`` relative to ``|J| |x|``).
    """
    x = np.array(x0, dtype=float, copy=True)
    m = x.shape[1]
    centre = np.mean(x, axis=1) if centre is None else centre
    done = np.zeros(m, dtype=bool)
    alive = np.all(np.isfinite(x), axis=0)
    with np.errstate(all="ignore"):
        for _ in range(max_iter):
            act = np.flatnonzero(alive & ~done)
            if act.size == 0:
                break
            xa = x[:, act]
            g = fun(xa)
            jm = jac(xa)
            step, good = _solve(jm, -g)
            good &= np.all(np.isfinite(g), axis=0)
            scaled = np.max(np.abs(step) / width[:, None], axis=0)
            jnorm = np.max(np.sum(np.abs(jm), axis=1), axis=0)
            xnorm = np.max(np.abs(xa), axis=0)
            conv = good & (scaled <= xtol) & (np.max(np.abs(g), axis=0) <= ftol * (1 + jnorm * (1 + xnorm)))
            done[act[conv]] = True
            x[:, act[conv]] += step[:, conv]  # the last (tiny) step is free accuracy
            alive[act[~good]] = False
            move = good & ~conv
            if not move.any():
                continue
            act, xa, g, step = act[move], xa[:, move], g[:, move], step[:, move]
            if deflated.shape[0]:
                logm, grad = _log_deflation(xa, deflated, width, power, shift)
                tau = 1.0 / (1.0 - np.sum(grad * step, axis=0))
                tau = np.where(np.isfinite(tau), tau, 1.0)
                step = step * tau
            else:
                logm = np.zeros(act.size)
            merit = logm + np.log(np.linalg.norm(g, axis=0) + 1e-300)
            lam = np.ones(act.size)
            new = xa + step
            pending = np.arange(act.size)
            for _ in range(8):
                trial = xa[:, pending] + lam[pending] * step[:, pending]
                gt = fun(trial)
                lt = _log_deflation(trial, deflated, width, power, shift)[0] if deflated.shape[0] else 0.0
                mt = lt + np.log(np.linalg.norm(gt, axis=0) + 1e-300)
                ok = np.all(np.isfinite(gt), axis=0) & np.isfinite(mt) & (mt < merit[pending])
                new[:, pending] = trial
                pending = pending[~ok]
                if pending.size == 0:
                    break
                lam[pending] /= 2
            x[:, act] = new
            stuck = np.zeros(act.size, dtype=bool)
            stuck[pending] = True  # no decrease along the step: stagnation, give up
            far = np.any(np.abs(new - centre[:, None]) > 1.5 * width[:, None], axis=0)  # a box width outside
            alive[act] &= np.all(np.isfinite(new), axis=0) & ~stuck & ~far
    return x, done


@lru_cache(maxsize=64)
def _sobol(d: int, log2m: int, seed: int) -> np.ndarray:
    pts = qmc.Sobol(d, scramble=True, seed=seed).random_base2(log2m)
    pts.flags.writeable = False
    return pts


def sobol(d: int, log2m: int, seed: int) -> np.ndarray:
    """``2**log2m`` scrambled Sobol points in ``[0, 1)^d``, seeded (cached: the same call, the same points)."""
    return _sobol(d, log2m, seed).copy()


def _between(roots: np.ndarray) -> np.ndarray:
    """Points a quarter, half and three quarters of the way between every pair of roots, ``(d, m)``."""
    pairs = [(a, b) for i, a in enumerate(roots) for b in roots[i + 1 :]]
    pts = [a + t * (b - a) for a, b in pairs for t in (0.25, 0.5, 0.75)]
    return np.array(pts).T if pts else np.empty((roots.shape[1], 0))


def _solve(jm: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve ``J[:, :, k] @ s[:, k] = rhs[:, k]`` for every column; singular or non-finite ones fail."""
    a = np.moveaxis(jm, -1, 0)
    b = rhs.T[:, :, None]
    ok = np.all(np.isfinite(a), axis=(1, 2)) & np.all(np.isfinite(rhs), axis=0)
    out = np.zeros_like(rhs)
    try:
        sol = np.linalg.solve(np.where(ok[:, None, None], a, np.eye(a.shape[1])), b)[:, :, 0].T
    except np.linalg.LinAlgError:
        sol = np.zeros_like(rhs)
        for k in np.flatnonzero(ok):
            try:
                sol[:, k] = np.linalg.solve(a[k], rhs[:, k])
            except np.linalg.LinAlgError:
                ok[k] = False
    ok &= np.all(np.isfinite(sol), axis=0)
    out[:, ok] = sol[:, ok]
    return out, ok


def _log_deflation(
    x: np.ndarray, roots: np.ndarray, width: np.ndarray, power: float, shift: float
) -> tuple[np.ndarray, np.ndarray]:
    """``log m(x)`` and its gradient for ``m = prod_i (|e_i|^-p + shift)``, ``e_i = (x - r_i) / width``."""
    e = (x[None, :, :] - roots[:, :, None]) / width[None, :, None]  # (k, d, m)
    r2 = np.maximum(np.sum(e * e, axis=1), 1e-300)  # (k, m)
    inv = r2 ** (-power / 2)
    mi = inv + shift
    logm = np.sum(np.log(mi), axis=0)
    # d/dx log(mi) = (1/mi) * (-p) * |e|^(-p-2) * e / width
    coef = -power * inv / r2 / mi  # (k, m)
    grad = np.sum(coef[:, None, :] * e, axis=0) / width[:, None]
    return logm, grad


def _distinct(points: list[np.ndarray], roots: np.ndarray, width: np.ndarray, tol: float = 1e-6) -> list:
    """The points that are neither within ``tol`` box widths of a root nor of an earlier point."""
    out: list[np.ndarray] = []
    for p in points:
        others = list(roots) + out
        if all(np.max(np.abs(p - q) / width) > tol for q in others):
            out.append(p)
    return out


def _inside(x: np.ndarray, lower: np.ndarray, upper: np.ndarray, rtol: float = 1e-9) -> bool:
    """Is ``x`` in the box, up to ``rtol`` of its width (so that roots on a face count)."""
    slack = rtol * np.maximum(upper - lower, 1.0)
    return bool(np.all(x >= lower - slack) and np.all(x <= upper + slack))


# ---------------------------------------------------------------------------------------------------------
# The constrained system and its starts


def _conservation(kin: Kinetics) -> np.ndarray:
    """Orthonormal rows ``(r, n)`` spanning the conservation rows of ``kin`` (maybe ``r = 0``)."""
    return _orthonormal(kin)[0]


def _orthonormal(kin: Kinetics) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal rows ``V = A @ W`` spanning the rows of ``W = kin.conservation``, and the map ``A``."""
    w = np.asarray(kin.conservation, dtype=float).reshape(-1, kin.n)
    if w.shape[0] == 0:
        return w, np.zeros((0, 0))
    u, s, vt = np.linalg.svd(w, full_matrices=False)
    rank = int(np.sum(s > 1e-12 * max(1.0, s.max())))
    return vt[:rank], (u[:, :rank] / s[:rank]).T


def _totals(kin: Kinetics, totals: np.ndarray | Sequence[float] | None) -> np.ndarray:
    """Totals for the rows of :func:`_orthonormal`, from ``totals`` given per row of ``kin.conservation``."""
    w, a = _orthonormal(kin)
    t = np.zeros(0) if totals is None else np.asarray(totals, dtype=float).ravel()
    if t.size != a.shape[1]:
        msg = f"`totals` must have one entry per conservation row ({a.shape[1]}), got {t.size}."
        raise ValueError(msg)
    return a @ t if w.shape[0] else np.zeros(0)


def _augmented(kin: Kinetics, w: np.ndarray, t: np.ndarray) -> tuple[Residual, Callable]:
    """Residual ``[Q.T f(u); W u - T]`` and its Jacobian ``[Q.T J; W]``, vectorised over points."""
    if w.shape[0] == 0:
        return kin.reaction, kin.jacobian
    q = conserved_basis(w, kin.n)

    def fun(u: np.ndarray) -> np.ndarray:
        return np.vstack([q.T @ kin.reaction(u), w @ u - t[:, None]])

    def jac(u: np.ndarray) -> np.ndarray:
        jm = np.einsum("ia,ajm->ijm", q.T, kin.jacobian(u))
        return np.concatenate([jm, np.broadcast_to(w[:, :, None], (*w.shape, u.shape[1]))], axis=0)

    return fun, jac


def _constrained_starts(
    w: np.ndarray, t: np.ndarray, lower: np.ndarray, upper: np.ndarray, starts: int, seed: int
) -> np.ndarray | None:
    """Sobol starts ``(n, m)`` spread over ``{W u = T}`` inside the box; None if that set misses the box.

    Without conservation the points fill the box. With it, ``u = u_p + N z`` is sampled over the bounding
    box of the feasible ``z`` (linear programs), then pulled into the box by alternating projections.
    """
    n = lower.size
    m = max(2, int(2 ** np.ceil(np.log2(max(starts, 2)))))
    if w.shape[0] == 0:
        pts = sobol(n, int(np.log2(m)), seed)
        return (lower + pts * (upper - lower)).T
    null = conserved_basis(w, n)  # (n, r)
    up = w.T @ t  # particular solution (w has orthonormal rows)
    r = null.shape[1]
    if r == 0:
        return up[:, None] if _inside(up, lower, upper) else None
    lo_z, hi_z = np.empty(r), np.empty(r)
    a_ub = np.vstack([null, -null])
    b_ub = np.concatenate([upper - up, up - lower])
    for i in range(r):
        c = np.zeros(r)
        c[i] = 1.0
        res_lo = linprog(c, A_ub=a_ub, b_ub=b_ub, bounds=(None, None))
        res_hi = linprog(-c, A_ub=a_ub, b_ub=b_ub, bounds=(None, None))
        if not (res_lo.success and res_hi.success):
            return None
        lo_z[i], hi_z[i] = res_lo.x[i], res_hi.x[i]
    pts = sobol(r, int(np.log2(m)), seed)
    u = up[:, None] + null @ (lo_z + pts * (hi_z - lo_z)).T
    for _ in range(20):
        u = np.clip(u, lower[:, None], upper[:, None])
        u = u - w.T @ (w @ u - t[:, None])
    return u


def _box(lower, upper, n: int, lname: str, uname: str) -> tuple[np.ndarray, np.ndarray]:
    """Validated box corners as float arrays of shape ``(n,)``."""
    lo = np.broadcast_to(np.asarray(lower, dtype=float), (n,)).copy()
    hi = np.broadcast_to(np.asarray(upper, dtype=float), (n,)).copy()
    if not np.all(hi >= lo):
        msg = f"`{uname}` must be at least `{lname}` in every entry."
        raise ValueError(msg)
    return lo, hi


# ---------------------------------------------------------------------------------------------------------
# Following a branch


def _continue(
    kin_prev: Kinetics, kin_next: Kinetics, guess: np.ndarray, prev: np.ndarray, pred: np.ndarray
) -> np.ndarray | None:
    """The root of ``kin_next`` on the branch through ``prev`` (a root of ``kin_prev``), or None."""
    wn, wp = _conservation(kin_next), _conservation(kin_prev)
    fn, jn = _augmented(kin_next, wn, wn @ guess)
    scale = np.maximum(np.abs(prev), 1e-2 * max(float(np.max(np.abs(prev))), 1e-8))
    root = _contract(fn, jn, pred, scale)
    if root is not None or wn.shape != wp.shape:
        return root
    fp, jp = _augmented(kin_prev, wp, wp @ guess)
    s, ds, x = 0.0, 0.5, prev
    while s < 1.0:
        s_try = min(1.0, s + ds)

        def fun(u: np.ndarray, a: float = s_try) -> np.ndarray:
            return (1 - a) * fp(u) + a * fn(u)

        def jac(u: np.ndarray, a: float = s_try) -> np.ndarray:
            return (1 - a) * jp(u) + a * jn(u)

        nxt = _contract(fun, jac, x, scale)
        if nxt is None:
            ds /= 2
            if ds < 1.0 / 512:
                return None
            continue
        s, x, ds = s_try, nxt, min(2 * ds, 1.0)
    return x


def _contract(fun: Residual, jac: Callable, x0: np.ndarray, scale: np.ndarray, max_iter: int = 12) -> np.ndarray | None:
    """Plain Newton from ``x0`` that must contract (each step at most half the last, the first below 0.25
    in units of ``scale``); returns the root or None. Such a root is the one nearest ``x0``."""
    x = np.array(x0, dtype=float)
    last = np.inf
    with np.errstate(all="ignore"):
        for _ in range(max_iter):
            step, ok = _solve(jac(x[:, None]), -fun(x[:, None]))
            size = float(np.max(np.abs(step[:, 0]) / scale))
            if not ok[0] or not np.isfinite(size):
                return None
            if size <= 1e-13:
                return x + step[:, 0]
            if size > (0.25 if last == np.inf else last / 2):
                return None
            x = x + step[:, 0]
            last = size
    return x if last <= 1e-10 else None
