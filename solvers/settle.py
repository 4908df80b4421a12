"""Settling detection and Newton polish of a stationary state.

The measure of motion is the *relative rate* ``||du/dt|| / max(||u||, floor)``, with ``||v||`` the
root-mean-square over the domain (node weights) summed over species; it has units of 1/time and does not
depend on the grid's resolution or on the scale of the state.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from .system import MolSystem

__all__ = ["PolishResult", "SettleRule", "polish", "relative_rate", "rms"]


def rms(weights: np.ndarray, v: np.ndarray) -> float:
    """Root-mean-square of ``v (n, m)`` over the domain, ``sqrt(sum_j w_j sum_i v_ij^2 / sum_j w_j)``."""
    return float(np.sqrt(np.sum((v * v) @ weights) / np.sum(weights)))


def relative_rate(weights: np.ndarray, u: np.ndarray, dudt: np.ndarray, floor: float) -> float:
    """``rms(du/dt) / max(rms(u), floor)``: how fast the state moves, relative to its size, per unit time."""
    return rms(weights, dudt) / max(rms(weights, u), floor)


@dataclass(frozen=True)
class SettleRule:
    """Stop when the relative rate stays below a tolerance over a window of time and of steps.

    Attributes
    ----------
    tol : relative rate (1/time) below which the state counts as still.
    window : time over which it must stay below ``tol``; make it longer than the slowest oscillation
        period that must not be mistaken for a steady state.
    min_steps : accepted steps the window must also span, so that a few huge steps cannot settle a run.

    Notes
    -----
    The tolerance actually used is ``max(tol, rtol / window)`` for a run at relative tolerance ``rtol``:
    a relative drift of less than ``rtol`` over the whole window is below what the error control
    resolves, so a tighter ``tol`` would only wait on round-off of the stepper. Being relative, the rate
    already scales with the state.
    """

    tol: float = 1e-6
    window: float = 20.0
    min_steps: int = 4

    def __post_init__(self) -> None:
        if not (np.isfinite(self.tol) and self.tol > 0):
            msg = f"`tol` must be finite and positive, got {self.tol!r}."
            raise ValueError(msg)
        if not (np.isfinite(self.window) and self.window > 0):
            msg = f"`window` must be finite and positive, got {self.window!r}."
            raise ValueError(msg)
        if self.min_steps < 1:
            msg = f"`min_steps` must be at least 1, got {self.min_steps!r}."
            raise ValueError(msg)

    def threshold(self, rtol: float) -> float:
        """The tolerance used for a run at relative tolerance ``rtol``."""
        return max(self.tol, rtol / self.window)

    def settled(self, t: np.ndarray, rate: np.ndarray, rtol: float) -> bool:
        """Whether the recorded rates ``rate`` at times ``t`` end in a still stretch that satisfies the rule."""
        t = np.asarray(t, dtype=float)
        above = np.flatnonzero(np.asarray(rate, dtype=float) >= self.threshold(rtol))
        start = above[-1] + 1 if above.size else 0
        count = t.size - start
        return bool(count >= self.min_steps and count > 0 and t[-1] - t[start] >= self.window)

    def tracker(self, rtol: float) -> SettleTracker:
        """An incremental checker for one run (the same verdict as `settled`, in O(1) per step)."""
        return SettleTracker(self.threshold(rtol), self.window, self.min_steps)


class SettleTracker:
    """Running state of a `SettleRule` over one run: feed it ``(t, rate)`` once per accepted step."""

    def __init__(self, tol: float, window: float, min_steps: int) -> None:
        self.tol, self.window, self.min_steps = tol, window, min_steps
        self._start: float | None = None
        self._count = 0

    def update(self, t: float, rate: float) -> bool:
        """Record one step; return True once the state has been still for the window."""
        if not rate < self.tol:
            self._start, self._count = None, 0
            return False
        if self._start is None:
            self._start = t
        self._count += 1
        return self._count >= self.min_steps and t - self._start >= self.window


@dataclass(frozen=True)
class PolishResult:
    """Outcome of `polish`.

    Attributes
    ----------
    u : ``(n, m)`` polished state (the input if polishing failed).
    residual : relative rate ``rms(du/dt) / rms(u)`` at ``u`` (1/time).
    success : whether Newton converged.
    message : why it stopped.
    iterations : Newton steps taken.
    """

    u: np.ndarray
    residual: float
    success: bool
    message: str
    iterations: int


def polish(
    disc,
    diffusion: np.ndarray,
    reaction,
    jacobian,
    u: np.ndarray,
    conserved_rows: np.ndarray | None = None,
    totals: np.ndarray | None = None,
    *,
    tol: float = 1e-10,
    maxiter: int = 30,
    max_move: float = 0.5,
) -> PolishResult:
    """Newton on the discrete steady equations ``F(u) = 0``, conserved totals held by a bordered system.

    For ``c`` conservation rows ``w`` (``w @ f == 0`` identically) the equations ``F = 0`` are rank
    deficient by ``c``; the bordered system ``[[J, C^T], [C, 0]] [du; mu] = [-F; T - C u]`` with ``C`` the
    total functionals restores a unique solution (``mu`` vanishes at the solution, since ``C^T mu`` would
    otherwise change the totals). Damped by halving while the residual does not drop.

    Parameters
    ----------
    disc, diffusion, reaction, jacobian : as for `solvers.stepping.integrate`.
    u : ``(n, m)`` starting state, usually the final state of a settled run.
    conserved_rows : ``(c, n)`` conservation rows, or None.
    totals : ``(c,)`` totals to hold; default the totals of ``u``.
    tol : relative rate at which to stop.
    maxiter : Newton steps allowed.
    max_move : largest relative change ``rms(u - u_start) / rms(u_start)`` accepted: a larger one means the
        start was not near a steady state, and polishing reports failure rather than jump elsewhere.
    """
    system = MolSystem(disc, diffusion, reaction, jacobian)
    u0 = np.array(u, dtype=float).reshape(system.shape)
    w = disc.weights
    rows = np.zeros((0, system.n)) if conserved_rows is None else np.asarray(conserved_rows, float)
    rows = rows.reshape(-1, system.n)
    target = system.totals(u0, rows) if totals is None else np.asarray(totals, dtype=float).ravel()
    if target.size != rows.shape[0]:
        msg = f"`totals` must have one entry per conservation row ({rows.shape[0]}), got {target.size}."
        raise ValueError(msg)
    c = rows.shape[0]
    border = sp.csr_matrix(np.kron(rows, w[None, :]))  # (c, n*m): the total functionals
    scale = max(rms(w, u0), 1e-300)

    def residual(v: np.ndarray) -> float:
        return relative_rate(w, v, system.rate(v), 1e-300)

    with np.errstate(all="ignore"):
        cur, res = u0, residual(u0)
        for it in range(maxiter + 1):
            if not np.isfinite(res):
                return PolishResult(u0, residual(u0), False, "non-finite residual", it)
            if res <= tol:
                return PolishResult(cur, res, True, "converged", it)
            if it == maxiter:
                break
            jac = system.mass_jacobian(cur)
            big = sp.bmat([[jac, border.T], [border, None]], format="csc") if c else jac.tocsc()
            rhs = np.concatenate([-system.force(cur).ravel(), target - system.totals(cur, rows)])
            try:
                step = spla.splu(big).solve(rhs)[: system.n * system.m].reshape(system.shape)
            except RuntimeError as err:
                return PolishResult(u0, residual(u0), False, f"singular Newton matrix ({err})", it)
            if not np.all(np.isfinite(step)):
                return PolishResult(u0, residual(u0), False, "non-finite Newton step", it)
            if rms(w, step) <= 1e-13 * scale:
                return PolishResult(cur, res, True, "converged (Newton step at round-off)", it)
            lam = 1.0
            while lam > 1e-4:
                trial = cur + lam * step
                trial_res = residual(trial)
                if np.isfinite(trial_res) and trial_res < res:
                    break
                lam *= 0.5
            else:
                return PolishResult(u0, residual(u0), False, "line search failed: no descent", it)
            cur, res = trial, trial_res
            if rms(w, cur - u0) > max_move * scale:
                msg = f"moved more than {max_move:g} (relative) from the start: not near a steady state"
                return PolishResult(u0, residual(u0), False, msg, it + 1)
    return PolishResult(u0, residual(u0), False, f"no convergence in {maxiter} Newton steps", maxiter)
