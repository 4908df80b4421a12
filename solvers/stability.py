"""Linear stability of a discrete steady state: rightmost eigenvalues of ``J v = lambda B v``.

The linearised flow is ``B d(delta)/dt = J delta`` with ``J`` the sparse Jacobian of the mass form and ``B``
its (sparse, symmetric) mass, or the identity. A conserved total ``q @ u`` satisfies ``q @ B^-1 J = 0``, so
every eigenvalue is zero or has an eigenvector with ``q @ v = 0``; the zero ones belong to the conserved
directions (the family of steady states) and are no instability. They are removed by a Brauer deflation,

    ``J' = J - beta B U Q^T``,  ``U = Q (Q^T Q)^-1``,

which moves exactly those eigenvalues to ``-beta`` and leaves every other eigenpair unchanged. ``J' - s B``
is solved by one sparse LU of ``J - s B`` and the Sherman-Morrison-Woodbury formula.

Shift-invert Arnoldi (ARPACK through `scipy.sparse.linalg.eigs`) on ``(J' - s B)^-1 B``, whose eigenvalues
are ``1 / (lambda - s)``, returns the ``k`` eigenvalues nearest the real shift ``s``. Put ``s`` a little to
the right of the spectrum. Every eigenvalue within `Spectrum.radius` of ``s`` is listed; an unstable one
can be missed only outside that disc (far right of ``s``, or with a large imaginary part behind ``k``
stable ones): compare the radius with the model's rates, or raise ``k``. Dense clusters (a slow species with tiny
diffusion, or symmetric domains with repeated eigenvalues) slow ARPACK down: about a thousand solves for
the 64 x 64 grid with ``D_slow = 1e-3``.

For rdcheck's discretisations with a conservation vector ``c`` over species, ``q = kron(c, weights)`` in
species-major order, with a lumped mass form (``B = I``) and a consistent one (``B = kron(I, M)``) alike.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

__all__ = ["Spectrum", "is_stable", "rightmost_eigenvalues", "spectrum"]


@dataclass(frozen=True)
class Spectrum:
    """Rightmost eigenvalues found, with how they were found.

    Attributes
    ----------
    eigenvalues : complex, sorted by decreasing real part, conserved zero modes removed.
    shift : the real shift ``s`` used.
    radius : every eigenvalue within this distance of ``shift`` is listed (0 if ARPACK did not converge).
    requested : number of eigenvalues asked for.
    converged : whether ARPACK converged on all of them (else ``eigenvalues`` holds the converged ones).
    removed : number of conserved directions deflated.
    """

    eigenvalues: np.ndarray
    shift: float
    radius: float
    requested: int
    converged: bool
    removed: int

    @property
    def max_real(self) -> float:
        """Largest real part found (``-inf`` if none)."""
        return float(self.eigenvalues.real.max()) if self.eigenvalues.size else -np.inf


def _conserved_columns(conserved, size: int) -> np.ndarray:
    """Conserved vectors as an ``(N, p)`` array (``p = 0`` when none)."""
    if conserved is None:
        return np.zeros((size, 0))
    q = np.asarray(conserved, dtype=float)
    if q.ndim == 1:
        q = q[:, None]
    elif q.ndim == 2 and q.shape[0] != size and q.shape[1] == size:
        q = q.T
    if q.ndim != 2 or q.shape[0] != size or not np.all(np.isfinite(q)):
        msg = f"`conserved` must be vectors of length {size} (as rows or columns), got shape {np.shape(conserved)}."
        raise ValueError(msg)
    if q.shape[1] and np.linalg.matrix_rank(q) < q.shape[1]:
        msg = "`conserved` vectors must be linearly independent."
        raise ValueError(msg)
    return q


def _deflated_solver(jac, mass, q: np.ndarray, shift: float, beta: float) -> Callable[[np.ndarray], np.ndarray]:
    """``x -> (J - beta B U Q^T - shift B)^-1 x`` by one sparse LU and Sherman-Morrison-Woodbury."""
    lu = spla.splu(sp.csc_matrix(jac - shift * mass, dtype=float))
    if q.shape[1] == 0:
        return lu.solve
    u = beta * (mass @ np.linalg.solve((q.T @ q).T, q.T).T)  # beta B Q (Q^T Q)^-1
    a_inv_u = lu.solve(u)
    capacitance = np.eye(q.shape[1]) - q.T @ a_inv_u

    def solve(x: np.ndarray) -> np.ndarray:
        y = lu.solve(x)
        return y + a_inv_u @ np.linalg.solve(capacitance, q.T @ y)

    return solve


def spectrum(
    jac,
    mass=None,
    k: int = 6,
    conserved=None,
    shift: float = 0.1,
    tol: float = 1e-8,
    ncv: int | None = None,
    maxiter: int | None = None,
    max_moves: int = 4,
) -> Spectrum:
    """The ``k`` eigenvalues of ``J v = lambda B v`` nearest ``shift``, conserved zero modes removed.

    Parameters
    ----------
    jac : ``(N, N)`` sparse Jacobian ``J`` at the steady state.
    mass : ``(N, N)`` sparse symmetric ``B``, or None for the identity.
    k : number of eigenvalues wanted (after removing the conserved modes).
    conserved : ``(N,)`` or ``(N, p)`` vectors ``q`` with ``q @ B^-1 J = 0`` (e.g. ``kron(c, weights)``).
    shift : real shift ``s`` in the model's time units, a little to the right of the expected rightmost
        eigenvalues and not an eigenvalue itself.
    tol, ncv, maxiter : passed to ARPACK (`scipy.sparse.linalg.eigs`); ``tol`` is relative to ``|1/(lambda-s)|``.
    max_moves : if an eigenvalue found lies right of the shift, the shift moves right of it and the search
        is repeated, at most this many times; `Spectrum.shift` is the shift finally used.
    """
    size = jac.shape[0]
    if jac.shape != (size, size):
        msg = f"`jac` must be square, got shape {jac.shape}."
        raise ValueError(msg)
    mass = sp.identity(size, format="csr") if mass is None else sp.csr_matrix(mass, dtype=float)
    if mass.shape != jac.shape:
        msg = f"`mass` must have the shape of `jac` {jac.shape}, got {mass.shape}."
        raise ValueError(msg)
    shift = float(shift)
    if not np.isfinite(shift):
        msg = f"`shift` must be a finite real number, got {shift!r}."
        raise ValueError(msg)
    q = _conserved_columns(conserved, size)
    p = q.shape[1]
    if not 1 <= k <= size - p - 2:
        msg = f"`k` must be in 1 .. {size - p - 2} for this problem, got {k!r}."
        raise ValueError(msg)
    found = _nearest(jac, mass, q, k, shift, tol, ncv, maxiter)
    # step: an eigenvalue right of the shift means the shift sat inside the spectrum; move it right, retry
    for _ in range(max_moves):
        if not (found.converged and found.eigenvalues.size and found.max_real >= found.shift):
            break
        step = max(0.1 * abs(found.max_real), 0.1 * found.radius, 1e-3)
        found = _nearest(jac, mass, q, k, found.max_real + step, tol, ncv, maxiter)
    return found


def _nearest(jac, mass, q: np.ndarray, k: int, shift: float, tol: float, ncv, maxiter) -> Spectrum:
    """One shift-invert Arnoldi run: the ``k`` eigenvalues nearest ``shift``, deflated modes dropped."""
    # step: deflate the conserved modes to -beta, far beyond anything near the shift
    beta = 1e6 * max(1.0, abs(shift))
    solve = _deflated_solver(jac, mass, q, shift, beta)
    op = spla.LinearOperator(jac.shape, matvec=lambda x: solve(mass @ x), dtype=float)
    v0 = np.random.default_rng(0).standard_normal(jac.shape[0])  # reproducible Krylov start
    try:
        mu = spla.eigs(op, k=k, which="LM", v0=v0, tol=tol, ncv=ncv, maxiter=maxiter, return_eigenvectors=False)
        converged = True
    except spla.ArpackNoConvergence as err:
        mu, converged = err.eigenvalues, False
        warnings.warn(f"ARPACK converged on {len(mu)} of {k} eigenvalues.", stacklevel=3)
    mu = np.asarray(mu, dtype=complex)
    mu = mu[mu != 0.0]
    lam = shift + 1.0 / mu
    lam = lam[np.abs(lam + beta) > 1e-6 * beta]
    radius = float(np.abs(lam - shift).max()) if converged and lam.size else 0.0
    lam = lam[np.argsort(-lam.real, kind="stable")]
    return Spectrum(eigenvalues=lam, shift=shift, radius=radius, requested=k, converged=converged, removed=q.shape[1])


def rightmost_eigenvalues(jac, mass=None, k: int = 6, conserved=None, shift: float = 0.1) -> np.ndarray:
    """The rightmost eigenvalues of ``J v = lambda B v`` by shift-invert (see `spectrum`), by decreasing real part."""
    return spectrum(jac, mass, k=k, conserved=conserved, shift=shift).eigenvalues


def is_stable(
    jac, mass=None, conserved=None, k: int = 6, shift: float = 0.1, margin: float = 0.0
) -> bool:
    """Whether the eigenvalues found (conserved modes removed) all have real part ``<= margin``.

    ``margin`` (in the model's time units) absorbs round-off or a neutral mode that the discretisation only
    nearly keeps (a rotation on a disk mesh). The verdict covers the eigenvalues within `Spectrum.radius` of
    ``shift``; call `spectrum` to see it. Raises ``RuntimeError`` if ARPACK converged on no eigenvalue.
    """
    found = spectrum(jac, mass, k=k, conserved=conserved, shift=shift)
    if found.eigenvalues.size == 0:
        msg = "ARPACK converged on no eigenvalue; raise `k` or change `shift`."
        raise RuntimeError(msg)
    return bool(found.max_real <= margin)
