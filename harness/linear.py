"""Linear (Turing) analysis of a homogeneous steady state (HSS) at finite diffusion and domain size.

A perturbation ``exp(sigma t) phi_k(x)`` of the HSS, with ``phi_k`` a Laplacian eigenfunction of wavenumber
``k``, evolves with the eigenvalues ``sigma`` of ``J - k^2 D`` (``J`` the reaction Jacobian at the HSS, ``D`` the
diagonal of diffusion coefficients). The *growth rate* at ``k`` is the largest real part of those eigenvalues:
positive means the mode grows (unstable), negative that it decays. At ``k = 0`` every linear conservation law
(``Kinetics.conservation``) contributes a structural zero eigenvalue that only moves the HSS along its family of
totals; those are left out, exactly as in `reduced_eigenvalues`, so the ``k = 0`` growth is the well-mixed
stability of the chosen member. For ``k > 0`` the same directions carry genuine eigenvalues (about ``-k^2``
times an effective diffusion coefficient) and are kept: a mass-conserved model may be unstable at arbitrarily
long wavelengths. Wavenumbers are in inverse length units of the case, wavelengths are ``2 pi / k``; on a bounded
domain with no-flux boundaries only the admissible (Neumann) modes count.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache, partial

import numpy as np
from scipy.optimize import brentq
from scipy.special import jnp_zeros

from .kinetics import Kinetics, reduced_eigenvalues

__all__ = [
    "MODE_SHAPES",
    "LinearVerdict",
    "Modes",
    "admissible_modes",
    "critical_ratio",
    "dispersion",
    "growth_rates",
    "linear_analysis",
]

# Scan over ln k: from 1e-3 sqrt(|J| / D_max) to 1e3 sqrt(|J| / D_min), points per decade, zoom on the peak.
_K_PAD = 3.0 * math.log(10.0)
_PER_DECADE = 8
_MIN_POINTS = 48
_FINE_POINTS = 15
_COARSE_POINTS = 32
_ZOOM_POINTS = 17
_ZOOM_LEVELS = 3
_PEAKS = 3
# Ratio search: rho = max(D_slow) / min(D_fast) from 1 down to 1e-12, a decade per coarse step.
_RHO_MIN = 1e-12
_RHO_STEPS_PER_DECADE = 1
_RHO_XTOL = 1e-10
_FD_STEP = 1e-3
_NEWTON_STEPS = 20
_NEWTON_XTOL = 1e-6
_NEWTON_MAX_STEP = 0.5
_ONSET_CHECK = 1e-7
_RHO_CHUNK = 6
_DOMAIN_STEPS_PER_DECADE = 4
_MAX_MODES = 5_000


# ---------------------------------------------------------------------------------------------------------
# Dispersion relation
# ---------------------------------------------------------------------------------------------------------


def _check_system(jac: np.ndarray, diffusion: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    jac = np.asarray(jac, dtype=float)
    diffusion = np.asarray(diffusion, dtype=float)
    if jac.ndim != 2 or jac.shape[0] != jac.shape[1] or not np.all(np.isfinite(jac)):
        msg = f"`jac` must be a finite square (n, n) array, got shape {jac.shape}."
        raise ValueError(msg)
    if diffusion.shape != (jac.shape[0],) or not np.all(np.isfinite(diffusion)) or np.any(diffusion < 0):
        msg = f"`diffusion` must be {jac.shape[0]} finite non-negative coefficients, got {diffusion!r}."
        raise ValueError(msg)
    return jac, diffusion


def _check_k2(k2: np.ndarray) -> np.ndarray:
    k2 = np.asarray(k2, dtype=float)
    if not np.all(np.isfinite(k2)) or np.any(k2 < 0):
        msg = "`k2` must hold finite non-negative squared wavenumbers."
        raise ValueError(msg)
    return k2


def _shifted(jac: np.ndarray, shifts: np.ndarray) -> np.ndarray:
    """The matrices ``jac - diag(shift)``, one for each row ``shift`` of ``shifts (..., n)``."""
    n = jac.shape[0]
    mats = np.empty((*shifts.shape[:-1], n, n))
    mats[...] = jac
    idx = np.arange(n)
    mats[..., idx, idx] -= shifts
    return mats


def _leading(jac: np.ndarray, shifts: np.ndarray) -> np.ndarray:
    """Largest real part of the eigenvalues of ``jac - diag(shift)`` for each row ``shift`` of ``shifts``."""
    return np.linalg.eigvals(_shifted(jac, shifts)).real.max(axis=-1)


def _has_conservation(conservation: np.ndarray | None) -> bool:
    return conservation is not None and np.asarray(conservation).size > 0


def _well_mixed_growth(jac: np.ndarray, conservation: np.ndarray | None) -> float:
    """Growth at ``k = 0`` with the conserved directions' structural zeros left out."""
    if not _has_conservation(conservation):
        return float(np.linalg.eigvals(jac).real.max())
    return float(np.max(reduced_eigenvalues(jac, conservation).real, initial=-np.inf))


def growth_rates(
    jac: np.ndarray, diffusion: np.ndarray, k2: np.ndarray, conservation: np.ndarray | None = None
) -> np.ndarray:
    """Leading real part of the eigenvalues of ``J - k^2 D`` for each squared wavenumber in ``k2``.

    At ``k2 == 0`` the structural zeros of the conserved directions (rows of ``conservation``) are left out;
    for ``k2 > 0`` every eigenvalue counts. Returns an array shaped like ``k2``.
    """
    jac, diffusion = _check_system(jac, diffusion)
    k2 = _check_k2(k2)
    flat = k2.ravel()
    rates = _leading(jac, flat[:, None] * diffusion)
    zero = flat == 0
    if zero.any() and _has_conservation(conservation):
        rates[zero] = _well_mixed_growth(jac, conservation)
    return rates.reshape(k2.shape)


def dispersion(
    jac: np.ndarray, diffusion: np.ndarray, k2: np.ndarray, conservation: np.ndarray | None = None
) -> np.ndarray:
    """All eigenvalues of ``J - k^2 D``, shape ``(*k2.shape, n)``, sorted by decreasing real part.

    At ``k2 == 0`` the conserved directions' structural zeros are left out and their slots, at the end of
    the row, hold NaN.
    """
    jac, diffusion = _check_system(jac, diffusion)
    k2 = _check_k2(k2)
    flat = k2.ravel()
    n = jac.shape[0]
    eig = np.linalg.eigvals(_shifted(jac, flat[:, None] * diffusion)).astype(complex)
    zero = flat == 0
    if zero.any() and _has_conservation(conservation):
        red = reduced_eigenvalues(jac, conservation).astype(complex)
        row = np.full(n, np.nan + 0j)
        row[: red.size] = red
        eig[zero] = row
    order = np.argsort(np.where(np.isnan(eig.real), np.inf, -eig.real), axis=-1, kind="stable")
    eig = np.take_along_axis(eig, order, axis=-1)
    return eig.reshape(*k2.shape, n)


# ---------------------------------------------------------------------------------------------------------
# Admissible modes on bounded domains (no-flux boundaries)
# ---------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Modes:
    """Neumann-Laplacian modes of a domain up to a cutoff, sorted by ``k2`` (the ``k = 0`` mode first).

    Attributes
    ----------
    shape : ``"interval"``, ``"rectangle"`` or ``"disk"``.
    k2 : ``(m,)`` squared wavenumbers (eigenvalues of ``-Laplacian`` with no-flux boundaries), ascending.
    labels : one tuple per mode: ``(n,)`` for ``cos(n pi x / L)``; ``(n, m)`` for
        ``cos(n pi x / Lx) cos(m pi y / Ly)``; ``(m, s)`` for ``J_m(j'_{m,s} r / R) cos|sin(m theta)``
        (``(0, 0)`` the constant).
    multiplicity : ``(m,)`` number of independent eigenfunctions behind each label (2 for disk ``m > 0``).
    """

    shape: str
    k2: np.ndarray
    labels: tuple[tuple[int, ...], ...]
    multiplicity: np.ndarray

    @property
    def k(self) -> np.ndarray:
        """Wavenumbers ``sqrt(k2)``."""
        return np.sqrt(self.k2)


@lru_cache(maxsize=1024)
def _bessel_prime_zeros(m: int, count: int) -> np.ndarray:
    """First ``count`` positive zeros ``j'_{m,s}`` of ``J_m'`` (cached: a sweep reuses one radius)."""
    zeros = jnp_zeros(m, count)
    zeros.setflags(write=False)
    return zeros


def _interval_modes(size: tuple[float, ...], k2_max: float) -> tuple[np.ndarray, list[tuple[int, ...]], np.ndarray]:
    (length,) = size
    n = np.arange(int(math.floor(length * math.sqrt(k2_max) / math.pi)) + 2)
    k2 = (n * math.pi / length) ** 2
    keep = k2 <= k2_max
    return k2[keep], [(int(i),) for i in n[keep]], np.ones(int(keep.sum()), dtype=int)


def _rectangle_modes(size: tuple[float, ...], k2_max: float) -> tuple[np.ndarray, list[tuple[int, ...]], np.ndarray]:
    lx, ly = size
    k_max = math.sqrt(k2_max)
    n = np.arange(int(math.floor(lx * k_max / math.pi)) + 2)
    m = np.arange(int(math.floor(ly * k_max / math.pi)) + 2)
    nn, mm = np.meshgrid(n, m, indexing="ij")
    k2 = (nn * math.pi / lx) ** 2 + (mm * math.pi / ly) ** 2
    keep = k2 <= k2_max
    return k2[keep], list(zip(nn[keep].tolist(), mm[keep].tolist())), np.ones(int(keep.sum()), dtype=int)


def _disk_modes(size: tuple[float, ...], k2_max: float) -> tuple[np.ndarray, list[tuple[int, ...]], np.ndarray]:
    (radius,) = size
    x_max = radius * math.sqrt(k2_max)
    k2, labels, mult = [0.0], [(0, 0)], [1]
    # j'_{m,1} > m for m >= 1 and consecutive zeros are at least pi apart, so this count is an upper bound.
    for m in range(int(math.floor(x_max)) + 1):
        count = int(math.floor(max(x_max - m, 0.0) / math.pi)) + 2
        zeros = _bessel_prime_zeros(m, 1 << max(3, (count - 1).bit_length()))  # powers of 2: cache hits
        while zeros[-1] <= x_max:
            zeros = _bessel_prime_zeros(m, 2 * zeros.size)
        for s, z in enumerate(zeros[zeros <= x_max], start=1):
            k2.append((z / radius) ** 2)
            labels.append((m, s))
            mult.append(1 if m == 0 else 2)
    return np.array(k2), labels, np.array(mult, dtype=int)


@dataclass(frozen=True)
class _Shape:
    """How one domain shape lists its modes, its first nonzero wavenumber and a bound on the mode count."""

    size_len: int
    build: Callable[[tuple[float, ...], float], tuple[np.ndarray, list[tuple[int, ...]], np.ndarray]]
    first_k: Callable[[tuple[float, ...]], float]
    count: Callable[[tuple[float, ...], float], float]


_SHAPES: dict[str, _Shape] = {
    "interval": _Shape(1, _interval_modes, lambda s: math.pi / s[0], lambda s, k: s[0] * k / math.pi + 2),
    "rectangle": _Shape(
        2,
        _rectangle_modes,
        lambda s: math.pi / max(s),
        lambda s, k: (s[0] * k / math.pi + 2) * (s[1] * k / math.pi + 2),
    ),
    "disk": _Shape(
        1,
        _disk_modes,
        lambda s: float(_bessel_prime_zeros(1, 8)[0]) / s[0],
        lambda s, k: (s[0] * k + 2) * (s[0] * k / math.pi + 2),
    ),
}


MODE_SHAPES: tuple[str, ...] = tuple(_SHAPES)
"""Domain shapes with known no-flux modes."""


def _check_domain(shape: str, size: float | tuple[float, ...]) -> tuple[_Shape, tuple[float, ...]]:
    if shape not in _SHAPES:
        msg = f"`shape` must be one of {sorted(_SHAPES)}, got {shape!r}."
        raise ValueError(msg)
    spec = _SHAPES[shape]
    sizes = tuple(float(v) for v in np.atleast_1d(np.asarray(size, dtype=float)))
    if len(sizes) != spec.size_len or not all(math.isfinite(v) and v > 0 for v in sizes):
        msg = f"`size` of a {shape} must be {spec.size_len} positive finite length(s), got {size!r}."
        raise ValueError(msg)
    return spec, sizes


def admissible_modes(shape: str, size: float | tuple[float, ...], k2_max: float) -> Modes:
    """No-flux modes of an interval ``(L,)``, a rectangle ``(Lx, Ly)`` or a disk ``(R,)`` with ``k^2 <= k2_max``.

    Interval ``k = n pi / L``; rectangle ``k^2 = (n pi / Lx)^2 + (m pi / Ly)^2``; disk ``k = j'_{m,s} / R``
    with ``j'_{m,s}`` the zeros of ``J_m'`` (the constant mode ``(0, 0)`` included).
    """
    spec, sizes = _check_domain(shape, size)
    if not (math.isfinite(k2_max) and k2_max >= 0):
        msg = f"`k2_max` must be finite and non-negative, got {k2_max!r}."
        raise ValueError(msg)
    k2, labels, mult = spec.build(sizes, float(k2_max))
    order = np.argsort(k2, kind="stable")
    return Modes(shape, k2[order], tuple(labels[i] for i in order), mult[order])


# ---------------------------------------------------------------------------------------------------------
# The unbounded line: scan over ln k, band edges (brentq) and the peak (zoom)
# ---------------------------------------------------------------------------------------------------------


def _line_growth(jac: np.ndarray, diffusion: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Growth at ``k = exp(x)`` (``x`` any shape)."""
    return _leading(jac, np.exp(2.0 * x)[..., None] * diffusion)


def _log_k_range(jac: np.ndarray, diffusion: np.ndarray) -> tuple[float, float]:
    """Scan range in ``ln k``: three decades beyond the reaction-diffusion scales ``sqrt(|J| / D)``."""
    scale = float(np.abs(jac).max()) or 1.0
    positive = diffusion[diffusion > 0]
    if positive.size == 0:
        return -_K_PAD, _K_PAD
    return 0.5 * math.log(scale / positive.max()) - _K_PAD, 0.5 * math.log(scale / positive.min()) + _K_PAD


def _scan_grid(lo: float, hi: float) -> np.ndarray:
    num = max(_MIN_POINTS, int(math.ceil((hi - lo) / math.log(10.0) * _PER_DECADE)) + 1)
    return np.linspace(lo, hi, num)


def _scan(jac: np.ndarray, diffusion: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Growth on the log-spaced scan, densified between points where two eigenvalues collide.

    Where a complex pair splits into two real eigenvalues one of them rises like a square root, and the
    growth can peak on a scale finer than the scan: between scan points whose number of real eigenvalues
    differs, ``_FINE_POINTS`` more points are added.
    """
    x = _scan_grid(*_log_k_range(jac, diffusion))
    eig = np.linalg.eigvals(_shifted(jac, np.exp(2.0 * x)[:, None] * diffusion))
    y = eig.real.max(axis=-1)
    n_real = np.sum(eig.imag == 0, axis=-1)
    changes = np.flatnonzero(np.diff(n_real))
    if changes.size == 0:
        return x, y
    fill = np.linspace(0.0, 1.0, _FINE_POINTS + 2)[1:-1]
    extra = (x[changes, None] + (x[changes + 1] - x[changes])[:, None] * fill).ravel()
    x, y = np.concatenate([x, extra]), np.concatenate([y, _line_growth(jac, diffusion, extra)])
    order = np.argsort(x)
    return x[order], y[order]


def _peak(fun: Callable[[np.ndarray], np.ndarray], x: np.ndarray, y: np.ndarray) -> tuple[float, float, int]:
    """Refine the scan's maximum: zoom on ``[x[i-1], x[i+1]]`` around its best local maxima, then a parabola.

    The ``_PEAKS`` highest interior local maxima are refined together (one batched call a level), since a
    narrow peak can hide below a neighbour's scan value. Returns ``(x_peak, y_peak, i)`` with ``i`` the
    winner's scan index; an end of the scan wins (as is) when no refined peak exceeds it.
    """
    edge = 0 if y[0] >= y[-1] else x.size - 1
    inner = np.flatnonzero((y[1:-1] >= y[:-2]) & (y[1:-1] >= y[2:])) + 1
    if inner.size == 0:
        return float(x[edge]), float(y[edge]), edge
    cand = inner[np.argsort(-y[inner], kind="stable")[:_PEAKS]]
    rows = np.arange(cand.size)
    lo, hi = x[cand - 1], x[cand + 1]
    best_x, best_y = x[cand].astype(float), y[cand].astype(float)
    fill = np.linspace(0.0, 1.0, _ZOOM_POINTS)
    for _ in range(_ZOOM_LEVELS):
        xs = lo[:, None] + (hi - lo)[:, None] * fill
        ys = fun(xs)
        top = ys.argmax(axis=1)
        better = ys[rows, top] >= best_y
        best_x = np.where(better, xs[rows, top], best_x)
        best_y = np.where(better, ys[rows, top], best_y)
        j = np.clip(top, 1, _ZOOM_POINTS - 2)
        lo, hi = xs[rows, j - 1], xs[rows, j + 1]
    # step: vertex of the parabola through the last three points around each maximum
    y0, y1, y2 = ys[rows, j - 1], ys[rows, j], ys[rows, j + 1]
    curvature = y0 - 2.0 * y1 + y2
    concave = curvature < 0
    xv = xs[rows, j] + 0.5 * (xs[rows, j + 1] - xs[rows, j]) * (y0 - y2) / np.where(concave, curvature, -1.0)
    use = np.flatnonzero(concave & (xv >= lo) & (xv <= hi))
    if use.size:
        yv = fun(xv[use])
        better = yv > best_y[use]
        best_x[use[better]], best_y[use[better]] = xv[use[better]], yv[better]
    c = int(np.argmax(best_y))
    if y[edge] >= best_y[c]:
        return float(x[edge]), float(y[edge]), edge
    return float(best_x[c]), float(best_y[c]), int(cand[c])


def _conserved_rows(conservation: np.ndarray | None, n: int) -> np.ndarray:
    """Orthonormal rows spanning the conservation laws, ``(c, n)``."""
    if not _has_conservation(conservation):
        return np.zeros((0, n))
    w = np.asarray(conservation, dtype=float).reshape(-1, n)
    _, s, vt = np.linalg.svd(w)
    return vt[: int(np.sum(s > 1e-12 * max(1.0, s.max())))]


def _long_wave(jac: np.ndarray, rows: np.ndarray) -> Callable[[np.ndarray], float]:
    """Long-wave growth coefficient ``r(D)`` of the conserved modes: their eigenvalues are ``~ k^2 r`` as k -> 0.

    For left null vectors ``W`` (the conservation rows) and right null vectors ``V`` of ``J``, first-order
    perturbation of the semisimple zero eigenvalue by ``-k^2 D`` gives ``-k^2 eig((W V)^-1 W D V)``;
    ``r = max(-Re eig(...))`` is positive exactly when the HSS is unstable at every small ``k``. Without
    conservation (or at a degenerate HSS) ``r = -inf``.
    """
    c = rows.shape[0]
    if c == 0:
        return lambda diffusion: -math.inf
    _, _, vt = np.linalg.svd(jac)
    v = vt[-c:].T
    wv = rows @ v
    if np.linalg.cond(wv) > 1e12:
        return lambda diffusion: -math.inf
    wv_inv = np.linalg.inv(wv)

    def rate(diffusion: np.ndarray) -> float:
        return float(np.max(-np.linalg.eigvals(wv_inv @ (rows * diffusion) @ v).real))

    return rate


@dataclass(frozen=True)
class _Line:
    bands: tuple[tuple[float, float], ...]
    fastest_k: float
    fastest_growth: float


def _growth_at_k(jac: np.ndarray, diffusion: np.ndarray, wm_growth: float, k: float) -> float:
    """Growth at wavenumber ``k``, the well-mixed (conserved zeros left out) value at ``k = 0``."""
    return float(_leading(jac, np.array([k * k * diffusion]))[0]) if k > 0 else wm_growth


def _root(fun: Callable[[float], float], a: float, b: float, xtol: float = 1e-12) -> float:
    return float(brentq(fun, a, b, xtol=xtol, rtol=4 * np.finfo(float).eps))


def _analyse_line(jac: np.ndarray, diffusion: np.ndarray, conserved: bool, wm_growth: float, lw_rate: float) -> _Line:
    """Unstable bands, fastest wavenumber and its growth on the unbounded line."""
    fun = partial(_line_growth, jac, diffusion)

    def scalar(t: float) -> float:
        return float(fun(np.array([t]))[0])

    x, y = _scan(jac, diffusion)
    xp, yp, i = _peak(fun, x, y)
    zero_d = diffusion == 0
    # step: the fastest mode, with the limits k -> 0+ and k -> inf at the ends of the scan
    if i == 0:
        fastest_k, fastest_growth = 0.0, max(wm_growth, 0.0) if conserved else wm_growth
        fastest_growth = max(fastest_growth, float(y[0]))
    elif i == x.size - 1 and zero_d.any():
        fastest_k = math.inf
        fastest_growth = float(np.linalg.eigvals(jac[np.ix_(zero_d, zero_d)]).real.max())
    else:
        fastest_k, fastest_growth = math.exp(xp), yp
        if 0 < i < x.size - 1:
            at = int(np.searchsorted(x, xp))
            x, y = np.insert(x, at, xp), np.insert(y, at, yp)
    # step: bands from sign changes of the scan, edges by brentq
    positive = y > 0
    bands = []
    starts = np.flatnonzero(positive & ~np.r_[False, positive[:-1]])
    ends = np.flatnonzero(positive & ~np.r_[positive[1:], False])
    for a, b in zip(starts, ends):
        if a > 0:
            lo = math.exp(_root(scalar, x[a - 1], x[a]))
        elif wm_growth > 0 or lw_rate > 0:
            lo = 0.0
        else:
            lo = _root(partial(_growth_at_k, jac, diffusion, wm_growth), 0.0, math.exp(x[0]))
        hi = math.inf if b == x.size - 1 else math.exp(_root(scalar, x[b], x[b + 1]))
        bands.append((float(lo), float(hi)))
    return _Line(tuple(bands), fastest_k, fastest_growth)


def _line_sup(jac: np.ndarray, diffusion: np.ndarray, lw_rate: float) -> tuple[float, float, bool]:
    """Supremum of the growth over ``k > 0``: ``(sup, ln k at the peak, peak inside the scan)``.

    The supremum is a continuous function of the coefficients, for root finding.
    """
    x, y = _scan(jac, diffusion)
    xp, yp, i = _peak(partial(_line_growth, jac, diffusion), x, y)
    return max(yp, math.exp(2.0 * x[0]) * lw_rate), xp, 0 < i < x.size - 1


# ---------------------------------------------------------------------------------------------------------
# Critical diffusion ratio
# ---------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _RatioFamily:
    """Diffusion coefficients along ``rho``: fast ones fixed, slow ones ``rho * min(D_fast) * unit``."""

    base: np.ndarray
    slow: np.ndarray
    d_fast_min: float
    unit: np.ndarray

    def at(self, rho: np.ndarray) -> np.ndarray:
        """Diffusion vectors ``(*rho.shape, n)`` at the ratios ``rho``."""
        rho = np.asarray(rho, dtype=float)
        d = np.broadcast_to(self.base, (*rho.shape, self.base.size)).copy()
        d[..., self.slow] = rho[..., None] * self.d_fast_min * self.unit
        return d


def _ratio_family(diffusion: np.ndarray, slow: np.ndarray) -> _RatioFamily | None:
    fast = ~slow
    if not slow.any() or not fast.any() or diffusion[fast].min() <= 0:
        return None
    d_slow = diffusion[slow]
    unit = d_slow / d_slow.max() if d_slow.max() > 0 else np.ones(d_slow.size)
    return _RatioFamily(diffusion, slow, float(diffusion[fast].min()), unit)


def _own_ratio(diffusion: np.ndarray, slow: np.ndarray) -> float | None:
    fast = ~slow
    if not slow.any() or not fast.any() or diffusion[fast].min() <= 0:
        return None
    return float(diffusion[slow].max() / diffusion[fast].min())


def _coarse_sup(
    jac: np.ndarray, family: _RatioFamily, rhos: np.ndarray, lw: Callable[[np.ndarray], float]
) -> np.ndarray:
    """Rough growth supremum at several ratios in one batched eigenvalue call."""
    d = family.at(rhos)
    ranges = np.array([_log_k_range(jac, row) for row in d])
    x = ranges[:, :1] + (ranges[:, 1:] - ranges[:, :1]) * np.linspace(0.0, 1.0, _COARSE_POINTS)
    sup = _leading(jac, np.exp(2.0 * x)[..., None] * d[:, None, :]).max(axis=1)
    long_wave = np.array([math.exp(2.0 * xr[0]) * lw(row) for xr, row in zip(x, d)])
    return np.maximum(sup, long_wave)


def _critical_line(jac: np.ndarray, family: _RatioFamily, lw: Callable[[np.ndarray], float]) -> float | None:
    """Largest ``rho`` in ``[1e-12, 1]`` below which the line is unstable.

    A coarse batched scan (a decade a step) brackets the onset and a full scan confirms its unstable end.
    The onset is then solved as a neutral peak by Newton's method and accepted if a full scan just above it
    is stable; otherwise brentq on ``ln rho`` of the growth supremum (full scans) finds it.
    """

    def full(t: float) -> tuple[float, float, bool]:
        d = family.at(np.array(math.exp(t)))
        return _line_sup(jac, d, lw(d))

    step = math.log(10.0) / _RHO_STEPS_PER_DECADE
    ln_rhos = -np.arange(int(round(-math.log10(_RHO_MIN) * _RHO_STEPS_PER_DECADE)) + 1) * step
    for start in range(0, ln_rhos.size, _RHO_CHUNK):
        chunk = ln_rhos[start : start + _RHO_CHUNK]
        for j in np.flatnonzero(_coarse_sup(jac, family, np.exp(chunk), lw) > 0) + start:
            sup, x_peak, interior = full(ln_rhos[j])
            if sup <= 0:
                continue
            if j == 0:
                return None
            if interior:
                t = _neutral_peak(jac, family, x_peak, ln_rhos[j], ln_rhos[j - 1])
                if t is not None and full(t + _ONSET_CHECK)[0] <= 0:
                    return math.exp(t)
            upper = j - 1
            while full(ln_rhos[upper])[0] > 0:
                if upper == 0:
                    return None
                upper -= 1
            return math.exp(_root(lambda t: full(t)[0], ln_rhos[upper + 1], ln_rhos[upper], _RHO_XTOL))
    return None


def _neutral_peak(jac: np.ndarray, family: _RatioFamily, x: float, t_lo: float, t_hi: float) -> float | None:
    """Newton's method for a neutral peak: ``sigma = 0`` and ``d sigma / d ln k = 0`` in ``(ln k, ln rho)``.

    Derivatives come from central differences on a 3 x 3 stencil (one batched eigenvalue call a step).
    Steps are damped to 0.5 and clipped to ``[t_lo, t_hi]``. Returns ``ln rho`` at the solution, or None if
    the iteration fails to converge in that bracket or lands on a minimum in ``k``.
    """
    h = _FD_STEP
    offsets = np.array([-h, 0.0, h])
    t = t_lo
    for _ in range(_NEWTON_STEPS):
        d = family.at(np.exp(t + offsets))
        s = _leading(jac, np.exp(2.0 * (x + offsets))[None, :, None] * d[:, None, :])  # s[t, x]
        f = s[1, 1]
        fx, ft = (s[1, 2] - s[1, 0]) / (2 * h), (s[2, 1] - s[0, 1]) / (2 * h)
        fxx = (s[1, 2] - 2 * s[1, 1] + s[1, 0]) / h**2
        fxt = (s[2, 2] - s[2, 0] - s[0, 2] + s[0, 0]) / (4 * h**2)
        det = fx * fxt - ft * fxx
        if not (math.isfinite(det) and det != 0):
            return None
        dx, dt = (ft * fx - f * fxt) / det, (f * fxx - fx * fx) / det
        if abs(dt) < _RHO_XTOL and abs(dx) < _NEWTON_XTOL:
            return t + dt if fxx < 0 and t_lo <= t + dt <= t_hi else None
        # step: damped, and kept inside the bracket
        scale = min(1.0, _NEWTON_MAX_STEP / max(abs(dx), abs(dt)))
        x, t = x + scale * dx, min(max(t + scale * dt, t_lo), t_hi)
    return None


def _band_top(jac: np.ndarray, diffusion: np.ndarray) -> float | None:
    """A wavenumber above every unstable scan point on the line (None: line stable on the scan)."""
    x, y = _scan(jac, diffusion)
    positive = np.flatnonzero(y > 0)
    if positive.size == 0:
        return None
    return math.exp(x[min(positive[-1] + 1, x.size - 1)])


def _domain_sup(jac: np.ndarray, d: np.ndarray, k2: np.ndarray) -> float:
    return float(_leading(jac, k2[:, None] * d).max())


def _critical_domain(
    jac: np.ndarray, family: _RatioFamily, rho_line: float, shape: str, size: tuple[float, ...]
) -> float | None:
    """Largest ``rho <= rho_line`` at which an admissible ``k > 0`` mode turns unstable (brentq on ``ln rho``).

    Steps down from the line's onset a quarter decade at a time; at the first ratio where a mode inside the
    line's band is unstable, the modes up to that band's top are fixed and the crossing is bracketed.
    """
    spec = _SHAPES[shape]
    k1 = spec.first_k(size)
    step = math.log(10.0) / _DOMAIN_STEPS_PER_DECADE
    t_prev = math.log(rho_line)
    for i in range(1, int(math.log(rho_line / _RHO_MIN) / step) + 1):
        t = math.log(rho_line) - i * step
        d = family.at(np.array(math.exp(t)))
        top = _band_top(jac, d)
        if top is None or top < k1:
            t_prev = t
            continue
        k_cap = 1.05 * top
        if spec.count(size, k_cap) > _MAX_MODES:
            return None
        k2 = admissible_modes(shape, size, k_cap**2).k2[1:]

        def sup(s: float, k2: np.ndarray = k2) -> float:
            return _domain_sup(jac, family.at(np.array(math.exp(s))), k2)

        if sup(t) > 0:
            if sup(t_prev) >= 0:
                return math.exp(t_prev)
            return math.exp(_root(sup, t, t_prev, _RHO_XTOL))
        t_prev = t
    return None


def _critical_ratios(
    jac: np.ndarray,
    diffusion: np.ndarray,
    slow: np.ndarray,
    rows: np.ndarray,
    wm_stable: bool,
    shape: str | None,
    size: tuple[float, ...] | None,
) -> tuple[float | None, float | None]:
    family = _ratio_family(diffusion, slow)
    if family is None or not wm_stable:
        return None, None
    rho_line = _critical_line(jac, family, _long_wave(jac, rows))
    if rho_line is None or shape is None:
        return rho_line, None
    return rho_line, _critical_domain(jac, family, rho_line, shape, size)


def _jacobian_at(kin: Kinetics, hss: np.ndarray) -> np.ndarray:
    hss = np.asarray(hss, dtype=float)
    if hss.shape != (kin.n,) or not np.all(np.isfinite(hss)):
        msg = f"`hss` must be {kin.n} finite values (one per species), got {hss!r}."
        raise ValueError(msg)
    jac = kin.jac(hss)
    if not np.all(np.isfinite(jac)):
        msg = f"`hss` gives a non-finite Jacobian at {hss!r}."
        raise ValueError(msg)
    return jac


def critical_ratio(
    kin: Kinetics, hss: np.ndarray, shape: str | None = None, size: float | tuple[float, ...] | None = None
) -> float | None:
    """Diffusion ratio ``rho = max(D_slow) / min(D_fast)`` at which the HSS turns linearly unstable.

    The fast coefficients stay as in ``kin``; the slow ones are scaled by one common factor (all equal when
    they are all zero in ``kin``). Moving ``rho`` down from 1 (slow as fast as the slowest fast species) to
    1e-12, the onset is the largest ``rho`` at which the growth supremum over ``k > 0`` changes sign. A coarse
    batched scan (a decade a step) brackets it; Newton's method on the neutral peak (growth and its
    ``k``-derivative zero) refines it and a scan just above confirms it, with brentq on ``ln rho`` of the
    supremum as the fallback. With ``shape``/``size`` the supremum is over the admissible modes of that domain,
    so the onset is where the first mode crosses: stepping down from the line's onset a quarter decade at a
    time brackets it and brentq on ``ln rho`` refines it.

    Returns None when no ratio in ``[1e-12, 1]`` destabilises the HSS, when the HSS is already unstable at
    ``rho = 1`` or well-mixed unstable, when there is no slow or no diffusing fast species, or (domain only)
    when the onset would need more than 5 000 modes (a domain large
    enough to be treated as the unbounded line). An instability window narrower than a decade of ``rho`` may
    be missed.
    """
    jac = _jacobian_at(kin, hss)
    diffusion, slow = np.asarray(kin.diffusion, dtype=float), np.asarray(kin.slow, dtype=bool)
    _check_system(jac, diffusion)
    sizes = _check_domain(shape, size)[1] if shape is not None else None
    wm_stable = _well_mixed_growth(jac, kin.conservation) < 0
    rows = _conserved_rows(kin.conservation, kin.n)
    line, domain = _critical_ratios(jac, diffusion, slow, rows, wm_stable, shape, sizes)
    return line if shape is None else domain


# ---------------------------------------------------------------------------------------------------------
# The verdict
# ---------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LinearVerdict:
    """Linear stability of one HSS to spatial perturbations, on the unbounded line and on the case's domain.

    Attributes
    ----------
    well_mixed_stable : every ``k = 0`` eigenvalue (conserved zeros left out) has negative real part.
    well_mixed_growth : the largest of their real parts.
    line_turing_unstable : ``well_mixed_stable`` and some ``k > 0`` on the unbounded line grows.
    band : the unstable interval ``(k_lo, k_hi)`` of the line that holds the fastest mode, or None if no
        ``k > 0`` grows; ``k_lo = 0`` when it reaches arbitrarily long waves, ``k_hi = inf`` when it never ends
        (a non-diffusing block of species unstable on its own).
    bands : every unstable interval found on the line, ascending.
    fastest_k, fastest_wavelength, fastest_growth : the wavenumber maximising the growth over ``k > 0`` on the
        line (``0`` if the supremum is approached as ``k -> 0``, ``inf`` if as ``k -> inf``), ``2 pi / k`` and
        that supremum; reported also when it is negative (the least stable wavenumber).
    domain_unstable : some admissible mode with ``k > 0`` of the domain grows (whatever happens at ``k = 0``).
    turing_unstable : ``well_mixed_stable and domain_unstable``: a diffusion-driven instability that the case's
        own domain admits. This is the flag to compare with a noise start of the full PDE.
    mode_label, mode_k, mode_wavelength, mode_growth : the fastest (or least stable) admissible mode with
        ``k > 0`` and its growth; label None and ``k = inf`` when the supremum lies at ``k -> inf``. When the
        domain would need more than 5 000 modes up to the band's top it is treated as the unbounded line
        (label None, the line's fastest ``k`` and growth).
    ratio : the case's own ``max(D_slow) / min(D_fast)`` (None without slow or diffusing fast species).
    critical_ratio_line, critical_ratio_domain : see `critical_ratio`.
    """

    well_mixed_stable: bool
    well_mixed_growth: float
    line_turing_unstable: bool
    band: tuple[float, float] | None
    bands: tuple[tuple[float, float], ...]
    fastest_k: float
    fastest_wavelength: float
    fastest_growth: float
    domain_unstable: bool
    turing_unstable: bool
    mode_label: tuple[int, ...] | None
    mode_k: float
    mode_wavelength: float
    mode_growth: float
    ratio: float | None
    critical_ratio_line: float | None
    critical_ratio_domain: float | None


def _wavelength(k: float) -> float:
    if k == 0:
        return math.inf
    return 0.0 if math.isinf(k) else 2.0 * math.pi / k


def _fastest_mode(
    jac: np.ndarray, diffusion: np.ndarray, line: _Line, shape: str, size: tuple[float, ...]
) -> tuple[bool, tuple[int, ...] | None, float, float]:
    """Whether an admissible ``k > 0`` mode grows, and the fastest such mode ``(label, k, growth)``."""
    spec = _SHAPES[shape]
    top_infinite = bool(line.bands) and math.isinf(line.bands[-1][1])
    if math.isinf(line.fastest_k):
        return top_infinite or line.fastest_growth > 0, None, math.inf, line.fastest_growth
    finite = [e for band in line.bands for e in band if math.isfinite(e)] + [line.fastest_k]
    k_cap = max(1.5 * max(finite), 1.0001 * spec.first_k(size))
    if spec.count(size, k_cap) > _MAX_MODES:
        # step: the modes are dense on the scale of the band; the domain behaves as the unbounded line
        return line.fastest_growth > 0 or top_infinite, None, line.fastest_k, line.fastest_growth
    modes = admissible_modes(shape, size, k_cap**2)
    rates = _leading(jac, modes.k2[1:, None] * diffusion)
    j = int(np.argmax(rates))
    growth = float(rates[j])
    return top_infinite or growth > 0, modes.labels[j + 1], float(modes.k[j + 1]), growth


def linear_analysis(kin: Kinetics, hss: np.ndarray, shape: str, size: float | tuple[float, ...]) -> LinearVerdict:
    """Linear (Turing) verdict for the HSS ``hss`` of ``kin`` on the line and on the domain ``shape``/``size``.

    The line is scanned in ``ln k`` (8 points a decade, three decades beyond the scales ``sqrt(|J| / D)``,
    denser where eigenvalues collide); band edges are refined with brentq and the best local maxima by
    zooming on their brackets. The domain's modes are
    listed up to 1.5 times the largest finite band edge or fastest ``k`` (at least the first nonzero mode).
    """
    jac = _jacobian_at(kin, hss)
    diffusion, slow = np.asarray(kin.diffusion, dtype=float), np.asarray(kin.slow, dtype=bool)
    _check_system(jac, diffusion)
    _, sizes = _check_domain(shape, size)
    # step: k = 0, conserved zeros left out
    conserved = _has_conservation(kin.conservation)
    wm_growth = _well_mixed_growth(jac, kin.conservation)
    wm_stable = wm_growth < 0
    rows = _conserved_rows(kin.conservation, kin.n)
    lw = _long_wave(jac, rows)
    # step: the unbounded line, then the domain's admissible modes
    line = _analyse_line(jac, diffusion, conserved, wm_growth, lw(diffusion))
    line_unstable = line.fastest_growth > 0
    band = None
    if line_unstable:
        band = next((b for b in line.bands if b[0] <= line.fastest_k <= b[1]), None)
    domain_unstable, label, mode_k, mode_growth = _fastest_mode(jac, diffusion, line, shape, sizes)
    # step: critical ratios
    rho_line, rho_domain = _critical_ratios(jac, diffusion, slow, rows, wm_stable, shape, sizes)
    return LinearVerdict(
        well_mixed_stable=bool(wm_stable),
        well_mixed_growth=float(wm_growth),
        line_turing_unstable=bool(wm_stable and line_unstable),
        band=band,
        bands=line.bands,
        fastest_k=float(line.fastest_k),
        fastest_wavelength=_wavelength(line.fastest_k),
        fastest_growth=float(line.fastest_growth),
        domain_unstable=bool(domain_unstable),
        turing_unstable=bool(wm_stable and domain_unstable),
        mode_label=label,
        mode_k=float(mode_k),
        mode_wavelength=_wavelength(mode_k),
        mode_growth=float(mode_growth),
        ratio=_own_ratio(diffusion, slow),
        critical_ratio_line=rho_line,
        critical_ratio_domain=rho_domain,
    )
