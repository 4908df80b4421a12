"""The model layer: species, reactions and diffusion as SymPy, compiled to vectorised numpy functions.

Reactions compile to ``f(u (n, m), p (q,)) -> (n, m)``, the Jacobian to ``(n, n, m)`` and the derivative
in one parameter to ``(n, m)``, with common subexpressions shared (SymPy's ``cse``). Linear conservation
laws are detected here, and the slow / fast split of the species is decided here.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np

from .case import Case
from .errors import CaseError
from .expressions import ExpressionError, parse_expression
from .kinetics import Kinetics

__all__ = ["Model", "build_model", "detect_conservation", "split_species"]

#: Two diffusion coefficients at least this far apart (ratio) count as a clear slow / fast gap.
CLEAR_GAP = 10.0


@dataclass(frozen=True)
class Model:
    """A compiled model. Parameter values are bound later, by :meth:`kinetics`."""

    name: str
    species: tuple[str, ...]
    parameters: tuple[str, ...]
    reactions: tuple[object, ...]
    diffusions: tuple[object, ...]
    slow: np.ndarray
    split_reason: str
    conservation: np.ndarray
    conservation_exact: tuple[tuple[Fraction, ...], ...]
    _reaction: Callable = field(repr=False)
    _jacobian: Callable = field(repr=False)
    _diffusion: Callable = field(repr=False)
    _dparam: Mapping[str, Callable] = field(repr=False, default_factory=dict)
    fingerprint: str = ""

    @property
    def n(self) -> int:
        """Number of species."""
        return len(self.species)

    def param_vector(self, values: Mapping[str, float]) -> np.ndarray:
        """Parameter values in model order; every parameter must be given."""
        missing = [p for p in self.parameters if p not in values]
        if missing:
            msg = f"`values` lacks parameters {', '.join(missing)}"
            raise ValueError(msg)
        return np.array([float(values[p]) for p in self.parameters])

    def diffusion(self, values: Mapping[str, float]) -> np.ndarray:
        """Diffusion coefficients ``(n,)`` at the given parameter values."""
        return _as_vector(self._diffusion(self.param_vector(values)), self.n)

    def kinetics(self, values: Mapping[str, float], sweep_parameter: str | None = None) -> Kinetics:
        """Bind parameter values: the :class:`Kinetics` that analyses and solvers take."""
        p = self.param_vector(values)
        n, rfun, jfun = self.n, self._reaction, self._jacobian

        def reaction(u: np.ndarray) -> np.ndarray:
            return _fill((n,), rfun(u, p), u.shape[1:])

        def jacobian(u: np.ndarray) -> np.ndarray:
            return _fill((n, n), jfun(u, p), u.shape[1:])

        dparam = None
        if sweep_parameter is not None:
            dfun = self._dparam[sweep_parameter]

            def dparam(u: np.ndarray) -> np.ndarray:
                return _fill((n,), dfun(u, p), u.shape[1:])

        return Kinetics(
            species=self.species, diffusion=self.diffusion(values), slow=self.slow.copy(),
            conservation=self.conservation.copy(), reaction=reaction, jacobian=jacobian, dparam=dparam,
            params={k: float(values[k]) for k in self.parameters},
        )

    def totals(self, state: np.ndarray | Mapping[str, float]) -> np.ndarray:
        """Conserved totals ``W @ u`` of a homogeneous state (the baseline guess, typically)."""
        if isinstance(state, Mapping):
            state = np.array([state[s] for s in self.species], dtype=float)
        return self.conservation @ np.asarray(state, dtype=float)


def _as_vector(values: object, n: int) -> np.ndarray:
    return np.array([float(v) for v in values]) if isinstance(values, (list, tuple)) else np.full(n, values)


def _fill(lead: tuple[int, ...], entries: Sequence, points: tuple[int, ...]) -> np.ndarray:
    """Stack lambdified entries (arrays or constants) into an array shaped ``lead + points``."""
    out = np.empty(lead + points)
    flat = out.reshape((-1,) + points)
    for i, value in enumerate(entries):
        flat[i] = value
    return out


def _compile(args: list, exprs: list) -> Callable:
    import sympy as sp

    return sp.lambdify(args, exprs, modules="numpy", cse=True)


def build_model(case: Case) -> Model:
    """Parse and compile the case's model; errors name the case file and the key."""
    import sympy as sp

    names = case.species_names
    params = tuple(case.parameters)
    usyms = [sp.Symbol(s, real=True) for s in names]
    psyms = [sp.Symbol(p, real=True) for p in params]
    table = dict(zip(names, usyms)) | dict(zip(params, psyms))
    reactions, diffusions = [], []
    for spec in case.species:
        reactions.append(_parse(case.path, f"species.{spec.name}.reaction", spec.reaction, table))
        key = f"species.{spec.name}.diffusion"
        diffusions.append(_parse(case.path, key, spec.diffusion, dict(zip(params, psyms))))
    values = np.array([case.parameters[p] for p in params])
    dfun = _compile([psyms], diffusions)
    dvals = _as_vector(dfun(values), len(names))
    for spec, d in zip(case.species, dvals):
        if not np.isfinite(d) or d < 0:
            raise CaseError(case.path, f"species.{spec.name}.diffusion", f"must be >= 0, evaluates to {d}")
    slow, reason = split_species(case.path, names, dvals, [s.role for s in case.species])
    exact = ()
    if case.model.conserved == "auto":
        guess = np.array([case.guess[s] for s in names])
        exact = detect_conservation(reactions, usyms, psyms, values, guess)
    conservation = np.array([[float(c) for c in row] for row in exact], dtype=float)
    conservation = conservation.reshape(len(exact), len(names))
    jac = sp.Matrix(reactions).jacobian(usyms)
    sweep = case.sweep.parameter
    dparam = {sweep: _compile([usyms, psyms], [sp.diff(r, psyms[params.index(sweep)]) for r in reactions])}
    return Model(
        fingerprint=_fingerprint(names, reactions, diffusions, slow),
        name=case.model.name, species=names, parameters=params, reactions=tuple(reactions),
        diffusions=tuple(diffusions), slow=slow, split_reason=reason, conservation=conservation,
        conservation_exact=exact, _reaction=_compile([usyms, psyms], reactions),
        _jacobian=_compile([usyms, psyms], list(jac)), _diffusion=dfun, _dparam=dparam,
    )


def _fingerprint(names: Sequence[str], reactions: Sequence, diffusions: Sequence, slow: np.ndarray) -> str:
    """Hash of the canonical model (SymPy's canonical text of every expression): the model part of run keys."""
    import hashlib
    import json

    import sympy as sp

    text = json.dumps({"species": list(names), "reactions": [sp.srepr(r) for r in reactions],
                       "diffusion": [sp.srepr(d) for d in diffusions], "slow": [bool(x) for x in slow]})
    return hashlib.sha256(text.encode()).hexdigest()


def _parse(path: str, key: str, text: str, table: Mapping[str, object]):
    try:
        return parse_expression(text, table)
    except ExpressionError as exc:
        raise CaseError(path, key, str(exc)) from None


def split_species(path: str, names: Sequence[str], diffusion: np.ndarray,
                  roles: Sequence[str | None]) -> tuple[np.ndarray, str]:
    """Decide which species are slow: from declared roles, or from one clear gap in diffusion.

    Diffusion 0 counts as slow. Without roles, the sorted coefficients must show exactly one gap of a
    factor >= ``CLEAR_GAP``; below it is slow, above it fast. Anything else is ambiguous and refused.
    """
    declared = [r for r in roles if r is not None]
    if declared:
        if len(declared) != len(roles):
            missing = [n for n, r in zip(names, roles) if r is None]
            raise CaseError(path, f"species.{missing[0]}.role", "give `role` for every species or for none")
        slow = np.array([r == "slow" for r in roles])
        reason = "declared roles"
    else:
        order = np.argsort(diffusion, kind="stable")
        d = diffusion[order]
        with np.errstate(divide="ignore", invalid="ignore"):
            ratios = np.where(d[:-1] > 0, d[1:] / np.where(d[:-1] > 0, d[:-1], 1.0), np.inf)
        ratios = np.where((d[:-1] == 0) & (d[1:] == 0), 1.0, ratios)
        gaps = np.flatnonzero(ratios >= CLEAR_GAP)
        if len(gaps) != 1:
            what = "no clear gap" if len(gaps) == 0 else "more than one gap"
            listing = ", ".join(f"{n}={v:g}" for n, v in zip(names, diffusion))
            expected = (f"slow/fast split is ambiguous ({what} of x{CLEAR_GAP:g} in diffusion: {listing}); "
                        'declare role = "slow" or "fast" for every species')
            raise CaseError(path, "species.*.role", expected)
        slow = np.zeros(len(names), dtype=bool)
        slow[order[: gaps[0] + 1]] = True
        reason = f"inferred from a diffusion gap of x{ratios[gaps[0]]:.3g}"
    if slow.all() or not slow.any():
        raise CaseError(path, "species.*.role", "expected at least one slow and one fast species")
    return slow, reason


def detect_conservation(reactions: Sequence, usyms: Sequence, psyms: Sequence, values: np.ndarray,
                        guess: np.ndarray, seed: int = 7) -> tuple[tuple[Fraction, ...], ...]:
    """Rational rows ``w`` with ``w @ f(u) == 0`` for all states and all parameter values.

    The null space of reaction values at random states and randomly perturbed parameters is found by
    SVD, put in reduced row echelon form and rationalised, then checked at fresh random points. A law
    that holds only at special parameter values is not structural and is not reported.
    """
    fun = _compile([list(usyms), list(psyms)], list(reactions))
    n = len(usyms)
    rng = np.random.default_rng(seed)
    scale = np.maximum(np.abs(guess), 1.0)

    def sample(count: int) -> np.ndarray:
        rows = []
        for _ in range(count):
            u = rng.uniform(0.1, 2.0, n) * scale
            p = np.where(values != 0, values * rng.uniform(0.7, 1.3, len(values)), rng.uniform(0.1, 1.0))
            with np.errstate(all="ignore"):
                f = np.array(_as_vector(fun(u, p), n), dtype=float)
            if np.all(np.isfinite(f)):
                rows.append(f / max(1.0, np.abs(f).max()))
        return np.array(rows).reshape(-1, n)

    f = sample(4 * n + 8)
    if f.shape[0] < n + 2:
        return ()
    _, s, vt = np.linalg.svd(f)
    s = np.concatenate([s, np.zeros(n - len(s))])
    null = vt[s <= 1e-9 * max(s.max(), 1e-300)]
    if len(null) == 0:
        return ()
    rows = _rational_rref(null)
    check = sample(20)
    residual = np.abs(check @ np.array([[float(c) for c in r] for r in rows]).T)
    if np.any(residual > 1e-9):
        return ()
    return rows


def _rational_rref(null: np.ndarray) -> tuple[tuple[Fraction, ...], ...]:
    """Reduced row echelon form of a numeric basis, entries rounded to small rationals."""
    a = null.copy()
    rows, cols = a.shape
    pivot_row = 0
    for col in range(cols):
        if pivot_row == rows:
            break
        best = pivot_row + int(np.argmax(np.abs(a[pivot_row:, col])))
        if abs(a[best, col]) < 1e-8:
            continue
        a[[pivot_row, best]] = a[[best, pivot_row]]
        a[pivot_row] /= a[pivot_row, col]
        for r in range(rows):
            if r != pivot_row:
                a[r] -= a[r, col] * a[pivot_row]
        pivot_row += 1
    return tuple(tuple(Fraction(float(v)).limit_denominator(1000) for v in row) for row in a[:pivot_row])
