"""Initial states: a narrow pulse on a homogeneous baseline, or seeded smooth noise around it.

Both are defined as continuous functions of position and then put on the discretisation, so a height, a
width, an amplitude and a seed mean the same thing on every grid of the same domain, in 1D and in 2D.
States are ``(n, m)`` arrays: species by nodes.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np
from scipy.special import erf

from .records import Discretisation

__all__ = ["noise_field", "noise_state", "pulse_point", "pulse_profile", "pulse_state"]


def _baseline(disc: Discretisation, baseline: Sequence[float]) -> np.ndarray:
    """The baseline as a finite ``(n,)`` float array."""
    out = np.asarray(baseline, dtype=float)
    if out.ndim != 1 or out.size == 0 or not np.all(np.isfinite(out)):
        msg = f"`baseline` must be a finite 1-dimensional array over species, got shape {out.shape}."
        raise ValueError(msg)
    return out


def _species(idx: Sequence[int], n: int, name: str) -> np.ndarray:
    """Distinct species indices in ``0 .. n - 1``."""
    out = np.asarray(idx)
    if out.ndim != 1 or out.size == 0 or not np.issubdtype(out.dtype, np.integer):
        msg = f"`{name}` must be a non-empty sequence of species indices, got {idx!r}."
        raise ValueError(msg)
    if np.unique(out).size != out.size or out.min() < 0 or out.max() >= n:
        msg = f"`{name}` must hold distinct indices in 0 .. {n - 1}, got {idx!r}."
        raise ValueError(msg)
    return out


def _spacing(disc: Discretisation) -> float:
    """Typical node spacing ``(measure / m)^(1 / dim)``."""
    return float((disc.weights.sum() / disc.m) ** (1.0 / disc.dim))


def _refuse_negative(baseline: np.ndarray, state: np.ndarray, name: str, value: float) -> None:
    """Raise if a species that is non-negative at baseline has a negative value in ``state``."""
    low = state.min(axis=1)
    bad = np.flatnonzero((baseline >= 0.0) & (low < 0.0))
    if bad.size:
        s = int(bad[0])
        msg = (
            f"`{name}`={value!r} would make species {s} negative (minimum {low[s]:.3g} from baseline "
            f"{baseline[s]:.3g}); choose a smaller `{name}`."
        )
        raise ValueError(msg)


def pulse_point(disc: Discretisation, where: str | Sequence[float] = "edge") -> np.ndarray:
    """The pulse centre: ``"edge"``, ``"centre"`` or explicit coordinates inside the domain.

    ``"edge"`` is ``x = 0`` on an interval, the middle of the left side ``(0, Ly/2)`` of a rectangle and
    ``(R, 0)`` on a disk; ``"centre"`` is ``L/2``, ``(Lx/2, Ly/2)`` or the origin.
    """
    size = disc.size
    if disc.shape == "interval":
        named = {"edge": [0.0], "centre": [size[0] / 2]}
    elif disc.shape == "rectangle":
        named = {"edge": [0.0, size[1] / 2], "centre": [size[0] / 2, size[1] / 2]}
    else:
        named = {"edge": [size[0], 0.0], "centre": [0.0, 0.0]}
    if isinstance(where, str):
        if where not in named:
            msg = f"`where` must be 'edge', 'centre' or coordinates, got {where!r}."
            raise ValueError(msg)
        return np.array(named[where])
    point = np.asarray(where, dtype=float)
    if point.shape != (disc.dim,):
        msg = f"`where` must have {disc.dim} coordinates, got {where!r}."
        raise ValueError(msg)
    tol = 1e-12 * max(size)
    inside = (
        np.linalg.norm(point) <= size[0] + tol
        if disc.shape == "disk"
        else bool(np.all((point >= -tol) & (point <= np.asarray(size) + tol)))
    )
    if not inside:
        msg = f"`where`={where!r} lies outside the {disc.shape} of size {size}."
        raise ValueError(msg)
    return point


def _cell_averages(edges: np.ndarray, centre: float, width: float) -> np.ndarray:
    """Exact averages of ``exp(-(x - centre)^2 / (2 width^2))`` over the cells between ``edges``."""
    s = np.sqrt(2.0) * width
    cdf = erf((edges - centre) / s)
    return np.sqrt(np.pi / 2.0) * width * np.diff(cdf) / np.diff(edges)


def pulse_profile(disc: Discretisation, point: np.ndarray, width: float) -> np.ndarray:
    """The unit Gaussian ``exp(-|x - point|^2 / (2 width^2))`` on the discretisation, shape ``(m,)``.

    Finite volumes take the exact cell averages (so ``weights @ profile`` is the exact integral over the
    domain); P1 elements take nodal values (the interpolant).
    """
    if disc.method == "fv" and disc.grid is not None:
        parts = [
            _cell_averages(np.linspace(0.0, length, cells + 1), c, width)
            for length, cells, c in zip(disc.size, disc.grid, point, strict=True)
        ]
        out = parts[0]
        for part in parts[1:]:
            out = np.multiply.outer(out, part)
        return out.ravel()
    r2 = np.sum((disc.coords - point) ** 2, axis=1)
    return np.exp(-r2 / (2.0 * width**2))


def pulse_state(
    disc: Discretisation,
    baseline: Sequence[float],
    species_idx: Sequence[int],
    height: float,
    width: float,
    where: str | Sequence[float] = "edge",
    compensate: Sequence[float] | Sequence[Sequence[float]] | None = None,
    into: Sequence[int] | None = None,
) -> np.ndarray:
    """A Gaussian pulse on a homogeneous baseline, optionally mass-compensated.

    Parameters
    ----------
    disc : the discretisation.
    baseline : ``(n,)`` homogeneous state.
    species_idx : species that get the pulse.
    height : peak value added, signed: each listed species gets ``height * exp(-r^2 / (2 width^2))`` with
        ``r`` the distance to the pulse centre (see `pulse_profile` for how it is put on the grid).
    width : standard deviation of the Gaussian, in length units (the same in 1D and 2D, at any resolution).
        A warning is issued when it is below half the node spacing.
    where : pulse centre, see `pulse_point`. At an edge about half the Gaussian lies inside the domain.
    compensate : ``(n,)`` conservation vector ``c`` (or ``(q, n)`` rows, ``q = 0`` allowed), total
        ``sum_s c_s * weights @ u_s``.
        When given, species ``into`` are shifted by spatially uniform amounts ``delta`` (the minimum-norm
        solution of ``C[:, into] @ delta = -added totals / measure``) so that every conserved total equals
        the baseline's to round-off.
    into : species that absorb the compensation; default: every species outside ``species_idx`` with a
        nonzero coefficient in ``compensate`` (the fast species of a typical mass-conserved model).

    Returns
    -------
    ``(n, m)`` state.

    Raises
    ------
    ValueError
        If a species that is non-negative at baseline would turn negative (through the pulse or the
        compensation): the message names ``height``. Also for bad arguments, or totals that uniform shifts
        of ``into`` cannot restore.
    """
    base = _baseline(disc, baseline)
    n = base.size
    idx = _species(species_idx, n, "species_idx")
    height = float(height)
    width = float(width)
    if not np.isfinite(height):
        msg = f"`height` must be finite, got {height!r}."
        raise ValueError(msg)
    if not (np.isfinite(width) and width > 0.0):
        msg = f"`width` must be a finite positive length, got {width!r}."
        raise ValueError(msg)
    if width < 0.5 * _spacing(disc):
        msg = f"`width`={width:g} is below half the node spacing {_spacing(disc):.3g}: the pulse is under-resolved."
        warnings.warn(msg, stacklevel=2)
    profile = pulse_profile(disc, pulse_point(disc, where), width)
    state = np.repeat(base[:, None], disc.m, axis=1)
    state[idx] += height * profile
    if compensate is not None:
        added = height * (disc.weights @ profile)
        state += _compensation(base, idx, added, disc.weights.sum(), compensate, into)[:, None]
    _refuse_negative(base, state, "height", height)
    return state


def _compensation(
    base: np.ndarray,
    idx: np.ndarray,
    added: float,
    measure: float,
    compensate: Sequence[float] | Sequence[Sequence[float]],
    into: Sequence[int] | None,
) -> np.ndarray:
    """Uniform shifts ``(n,)`` of species ``into`` that cancel ``added`` (the pulse's integral) in every total."""
    n = base.size
    rows = np.asarray(compensate, dtype=float)
    rows = rows.reshape(0, n) if rows.size == 0 else np.atleast_2d(rows)
    if rows.ndim != 2 or rows.shape[1] != n or not np.all(np.isfinite(rows)):
        msg = f"`compensate` must be a finite vector over the {n} species (or rows of them), got {compensate!r}."
        raise ValueError(msg)
    if rows.shape[0] == 0:
        return np.zeros(n)  # no conservation law: nothing to keep
    if into is None:
        others = np.setdiff1d(np.arange(n), idx)
        into_idx = others[np.any(rows[:, others] != 0.0, axis=0)]
        if into_idx.size == 0:
            msg = "`compensate` has no nonzero coefficient outside `species_idx`; give `into` explicitly."
            raise ValueError(msg)
    else:
        into_idx = _species(into, n, "into")
    target = -added * rows[:, idx].sum(axis=1) / measure
    sub = rows[:, into_idx]
    delta = np.linalg.lstsq(sub, target, rcond=None)[0]
    scale = np.abs(target).max() + np.finfo(float).tiny
    if np.abs(sub @ delta - target).max() > 1e-12 * scale:
        msg = f"`compensate`: uniform shifts of species {into_idx.tolist()} cannot restore every conserved total."
        raise ValueError(msg)
    shifts = np.zeros(n)
    shifts[into_idx] = delta
    return shifts


def _wavevectors(rng: np.random.Generator, n: int, modes: int, dim: int, kmax: float) -> np.ndarray:
    """``(n, modes, dim)`` wavevectors uniform in the ball ``|k| <= kmax`` (a flat isotropic spectrum)."""
    if dim == 1:
        return kmax * rng.random((n, modes, 1))
    radius = kmax * np.sqrt(rng.random((n, modes)))
    angle = 2.0 * np.pi * rng.random((n, modes))
    return np.stack([radius * np.cos(angle), radius * np.sin(angle)], axis=-1)


def _default_correlation(disc: Discretisation) -> float:
    """One twentieth of the domain's extent: ``L``, ``max(Lx, Ly)`` or ``2 R``."""
    extent = 2.0 * disc.size[0] if disc.shape == "disk" else max(disc.size)
    return extent / 20.0


def noise_field(
    disc: Discretisation,
    n: int,
    seed: int,
    correlation: float | None = None,
    modes: int = 512,
    chunk: int = 4096,
) -> np.ndarray:
    """``(n, m)`` raw smooth random fields, one per species, before centring and scaling.

    Species ``s`` gets ``sum_j cos(k_sj . x + phi_sj)`` with ``modes`` wavevectors uniform in the ball
    ``|k| <= 2 pi / correlation`` and phases uniform in ``[0, 2 pi)``, all drawn from ``default_rng(seed)``
    before any position is seen: the field is one continuous function of position, whatever the grid.
    """
    corr = _default_correlation(disc) if correlation is None else float(correlation)
    if not (np.isfinite(corr) and corr > 0.0):
        msg = f"`correlation` must be a finite positive length, got {correlation!r}."
        raise ValueError(msg)
    rng = np.random.default_rng(seed)
    k = _wavevectors(rng, n, modes, disc.dim, 2.0 * np.pi / corr)
    phase = 2.0 * np.pi * rng.random((n, modes))
    out = np.empty((n, disc.m))
    # step: evaluate in blocks of nodes to bound memory at chunk x modes
    for start in range(0, disc.m, chunk):
        x = disc.coords[start : start + chunk]
        for s in range(n):
            out[s, start : start + chunk] = np.cos(x @ k[s].T + phase[s]).sum(axis=1)
    return out


def noise_state(
    disc: Discretisation,
    baseline: Sequence[float],
    amplitude: float,
    seed: int,
    species_idx: Sequence[int] | None = None,
    correlation: float | None = None,
    zero_mean: bool = True,
    modes: int = 512,
) -> np.ndarray:
    """The baseline plus seeded smooth noise of a given RMS amplitude.

    Parameters
    ----------
    disc : the discretisation.
    baseline : ``(n,)`` homogeneous state.
    amplitude : RMS of the added noise over the domain, ``sqrt(weights @ eta^2 / measure)``, in concentration
        units (absolute, not relative to the baseline), the same for every noisy species.
    seed : seed of the field (see `noise_field`): the same seed gives the same field, up to discretisation
        error, on any grid of the same domain; species always draw in order ``0 .. n - 1``, so a species'
        field does not depend on which others are noisy.
    species_idx : species that get noise; default all.
    correlation : shortest wavelength in the field, in length units; default a twentieth of the domain's
        extent (see `_default_correlation`). Values decorrelate over about half of it. A warning is issued
        when the node spacing exceeds half of it (the grid cannot carry the field).
    zero_mean : subtract the weighted mean of each species' field (default), so totals stay exactly the
        baseline's and every conserved total is kept to round-off.
    modes : number of random cosine modes per species.

    Raises
    ------
    ValueError
        If a species that is non-negative at baseline would turn negative: the message names ``amplitude``.
    """
    base = _baseline(disc, baseline)
    n = base.size
    idx = np.arange(n) if species_idx is None else _species(species_idx, n, "species_idx")
    amplitude = float(amplitude)
    if not (np.isfinite(amplitude) and amplitude >= 0.0):
        msg = f"`amplitude` must be finite and non-negative, got {amplitude!r}."
        raise ValueError(msg)
    field = noise_field(disc, n, seed, correlation, modes)
    corr = _default_correlation(disc) if correlation is None else float(correlation)
    if _spacing(disc) > 0.5 * corr:
        msg = f"`correlation`={corr:g} is below twice the node spacing {_spacing(disc):.3g}: noise is aliased."
        warnings.warn(msg, stacklevel=2)
    measure = disc.weights.sum()
    if zero_mean:
        field -= (field @ disc.weights)[:, None] / measure
    rms = np.sqrt((field**2 @ disc.weights) / measure)
    state = np.repeat(base[:, None], disc.m, axis=1)
    # step: centre and scale every species alike, so a species' values never depend on `species_idx`
    state[idx] += (field * (amplitude / rms)[:, None])[idx]
    _refuse_negative(base, state, "amplitude", amplitude)
    return state
