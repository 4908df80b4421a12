"""Case files: TOML in, validated frozen dataclasses out.

Every problem is reported as one :class:`~harness.errors.CaseError` line naming the file, the key and what
was expected. Command-line overrides (``--set``) are applied to the raw tables before validation, so an
override is checked exactly like the file itself.
"""

from __future__ import annotations

import copy
import keyword
import math
import sys
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import NoReturn

import numpy as np

from .errors import CaseError
from .expressions import FUNCTIONS

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = [
    "Case", "Domain", "ModelSpec", "NoiseSpec", "PulseSpec", "SolverSpec", "SpeciesSpec", "Sweep",
    "load_case", "parse_case", "apply_overrides",
]

SECTIONS = ("model", "parameters", "species", "baseline", "domain", "sweep", "starts", "solver")
SHAPES = ("interval", "rectangle", "disk")
ROLES = ("slow", "fast")
PLACES = ("edge", "centre")


@dataclass(frozen=True)
class ModelSpec:
    """The `[model]` section."""

    name: str
    conserved: str = "auto"


@dataclass(frozen=True)
class SpeciesSpec:
    """One `[species.X]` table: expressions are kept as text and compiled by the model layer."""

    name: str
    diffusion: str
    reaction: str
    role: str | None = None


@dataclass(frozen=True)
class Domain:
    """The `[domain]` section; `size` is ``(L,)``, ``(Lx, Ly)`` or ``(R,)`` by shape."""

    shape: str
    size: tuple[float, ...]

    def for_dim(self, dim: int) -> Domain:
        """The domain used for runs in ``dim`` dimensions.

        An interval of length L becomes an L x L square in 2D; a rectangle becomes its x-side in 1D and a
        disk of radius R becomes its diameter 2R in 1D.
        """
        if dim not in (1, 2):
            msg = f"`dim` must be 1 or 2, got {dim}"
            raise ValueError(msg)
        if dim == 1:
            if self.shape == "interval":
                return self
            length = self.size[0] if self.shape == "rectangle" else 2.0 * self.size[0]
            return Domain("interval", (length,))
        if self.shape == "interval":
            return Domain("rectangle", (self.size[0], self.size[0]))
        return self


@dataclass(frozen=True)
class Sweep:
    """The `[sweep]` section: one parameter and its values, in order."""

    parameter: str
    values: tuple[float, ...]


@dataclass(frozen=True)
class PulseSpec:
    """`starts.pulse`: a narrow bump on the listed species."""

    species: tuple[str, ...]
    width: float
    where: str | tuple[float, ...] = "edge"
    compensate: bool = True
    height: float | None = None


@dataclass(frozen=True)
class NoiseSpec:
    """`starts.noise`: seeded noise of a given absolute amplitude."""

    amplitude: float
    seed: int = 1


@dataclass(frozen=True)
class SolverSpec:
    """The `[solver]` section (resolutions, end time, tolerances)."""

    cells_1d: int = 400
    cells_2d: int = 64
    t_end: float = 2000.0
    rtol: float = 1e-4
    atol: float = 1e-8
    method: str = "fv"
    settle_tol: float = 1e-6
    settle_window: float = 50.0
    snapshots: int = 101
    polish: bool = False
    stability: bool = False


@dataclass(frozen=True)
class Case:
    """A validated case: one model and one study."""

    path: str
    model: ModelSpec
    parameters: Mapping[str, float]
    species: tuple[SpeciesSpec, ...]
    guess: Mapping[str, float]
    domain: Domain
    sweep: Sweep
    pulse: PulseSpec | None
    noise: NoiseSpec | None
    solver: SolverSpec
    raw: Mapping[str, object]

    @property
    def species_names(self) -> tuple[str, ...]:
        """Species names in the order of the file."""
        return tuple(s.name for s in self.species)

    def points(self) -> list[dict[str, float]]:
        """Parameter values at every sweep point, in sweep order."""
        return [{**self.parameters, self.sweep.parameter: v} for v in self.sweep.values]


def load_case(path: str | Path, overrides: Sequence[str] = ()) -> Case:
    """Read, override and validate a case file."""
    path = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise CaseError(path, "(file)", "no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise CaseError(path, "(file)", f"cannot be read ({exc.__class__.__name__})") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CaseError(path, "(toml)", f"not valid TOML ({exc})") from None
    return parse_case(apply_overrides(raw, overrides, path), path)


def apply_overrides(raw: Mapping[str, object], overrides: Sequence[str], path: str) -> dict:
    """Return a copy of the raw tables with ``NAME=VALUE`` / ``SECTION.KEY=VALUE`` overrides applied.

    A bare ``NAME`` must be an existing parameter; setting the sweep parameter collapses the sweep to
    that one value. Values are read as TOML values (numbers, strings, arrays, inline tables), falling
    back to a bare string.
    """
    data = copy.deepcopy(dict(raw))
    for item in overrides:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name:
            raise CaseError(path, f"--set {item}", "expected NAME=VALUE or SECTION.KEY=VALUE")
        value = _toml_value(text.strip())
        if "." not in name:
            _set_parameter(data, name, value, path)
        else:
            _set_nested(data, name.split("."), value, path)
    return data


def _toml_value(text: str) -> object:
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def _set_parameter(data: dict, name: str, value: object, path: str) -> None:
    params = data.get("parameters")
    if not isinstance(params, dict) or name not in params:
        known = ", ".join(params) if isinstance(params, dict) else "none"
        raise CaseError(path, f"--set {name}", f"not a parameter of this case (parameters: {known})")
    if not _is_number(value):
        raise CaseError(path, f"--set {name}", f"expected a number, got {value!r}")
    params[name] = value
    sweep = data.get("sweep")
    if isinstance(sweep, dict) and sweep.get("parameter") == name:
        sweep["values"] = [value]


def _set_nested(data: dict, keys: list[str], value: object, path: str) -> None:
    table = data
    for depth, key in enumerate(keys[:-1]):
        nxt = table.setdefault(key, {})
        if not isinstance(nxt, dict):
            where = ".".join(keys[: depth + 1])
            raise CaseError(path, f"--set {'.'.join(keys)}", f"`{where}` is not a table")
        table = nxt
    table[keys[-1]] = value
    if keys[0] == "parameters" and len(keys) == 2:
        _set_parameter(data, keys[1], value, path)


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


class _Reader:
    """Typed access to one table of the raw case, raising CaseError with the full key on misuse."""

    def __init__(self, path: str, table: Mapping[str, object], prefix: str) -> None:
        self.path, self.table, self.prefix = path, table, prefix

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def reject(self, name: str, expected: str) -> NoReturn:
        """Raise the one-line error for key ``name``."""
        raise CaseError(self.path, self.key(name), expected)

    def get(self, name: str, default: object = ...) -> object:
        if name not in self.table:
            if default is ...:
                self.reject(name, "missing (required)")
            return default
        return self.table[name]

    def number(self, name: str, default: object = ..., positive: bool = False) -> float:
        value = self.get(name, default)
        if not _is_number(value):
            self.reject(name, f"expected a finite number, got {value!r}")
        if positive and value <= 0:
            self.reject(name, f"expected a positive number, got {value!r}")
        return float(value)

    def integer(self, name: str, default: object = ..., minimum: int = 1) -> int:
        value = self.get(name, default)
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            self.reject(name, f"expected an integer >= {minimum}, got {value!r}")
        return value

    def string(self, name: str, default: object = ..., choices: Sequence[str] | None = None) -> str:
        value = self.get(name, default)
        if not isinstance(value, str):
            self.reject(name, f"expected a string, got {value!r}")
        if choices is not None and value not in choices:
            self.reject(name, f"expected one of {', '.join(choices)}, got {value!r}")
        return value

    def boolean(self, name: str, default: object = ...) -> bool:
        value = self.get(name, default)
        if not isinstance(value, bool):
            self.reject(name, f"expected true or false, got {value!r}")
        return value

    def sub(self, name: str, default: object = ...) -> _Reader:
        value = self.get(name, default)
        if not isinstance(value, Mapping):
            self.reject(name, f"expected a table, got {value!r}")
        return _Reader(self.path, value, self.key(name))

    def warn_unknown(self, known: Sequence[str]) -> None:
        for name in self.table:
            if name not in known:
                warnings.warn(f"{self.path}: `{self.key(name)}`: unknown key, ignored", stacklevel=4)


def parse_case(raw: Mapping[str, object], path: str = "<case>") -> Case:
    """Validate raw TOML tables into a :class:`Case` (cheap checks only; expressions are checked later)."""
    top = _Reader(path, raw, "")
    top.warn_unknown(SECTIONS)
    model = _model(top.sub("model"))
    parameters = _parameters(top.sub("parameters"))
    species = _species(top.sub("species"), parameters)
    guess = _guess(top.sub("baseline"), species)
    domain = _domain(top.sub("domain"))
    sweep = _sweep(top.sub("sweep"), parameters)
    starts = top.sub("starts", {})
    starts.warn_unknown(("pulse", "noise"))
    pulse = _pulse(starts.sub("pulse"), species) if "pulse" in starts.table else None
    noise = _noise(starts.sub("noise")) if "noise" in starts.table else None
    solver = _solver(top.sub("solver", {}))
    return Case(path, model, parameters, species, guess, domain, sweep, pulse, noise, solver, raw)


def _model(r: _Reader) -> ModelSpec:
    r.warn_unknown(("name", "conserved"))
    name = r.string("name")
    if not name.strip():
        r.reject("name", "expected a non-empty name")
    return ModelSpec(name=name, conserved=r.string("conserved", "auto", choices=("auto", "none")))


def _check_name(r: _Reader, name: str, what: str) -> None:
    if not name.isidentifier() or keyword.iskeyword(name) or name in FUNCTIONS:
        reserved = ", ".join(FUNCTIONS)
        r.reject(name, f"a {what} name must be an identifier, not a keyword nor one of {reserved}")


def _parameters(r: _Reader) -> dict[str, float]:
    params = {}
    for name in r.table:
        _check_name(r, name, "parameter")
        params[name] = r.number(name)
    return params


def _species(r: _Reader, parameters: Mapping[str, float]) -> tuple[SpeciesSpec, ...]:
    if not r.table:
        r.reject("", "expected at least one species table")
    out = []
    for name in r.table:
        _check_name(r, name, "species")
        if name in parameters:
            r.reject(name, "a species may not share its name with a parameter")
        s = r.sub(name)
        s.warn_unknown(("diffusion", "reaction", "role"))
        diffusion = s.get("diffusion")
        if _is_number(diffusion):
            if diffusion < 0:
                s.reject("diffusion", f"expected a number >= 0, got {diffusion!r}")
            diffusion = repr(float(diffusion))
        elif not isinstance(diffusion, str):
            s.reject("diffusion", f"expected a number or an expression string, got {diffusion!r}")
        reaction = s.get("reaction")
        if _is_number(reaction):
            reaction = repr(float(reaction))
        elif not isinstance(reaction, str):
            s.reject("reaction", f"expected an expression string, got {reaction!r}")
        role = s.string("role", None, choices=ROLES) if "role" in s.table else None
        out.append(SpeciesSpec(name, diffusion, reaction, role))
    return tuple(out)


def _guess(r: _Reader, species: Sequence[SpeciesSpec]) -> dict[str, float]:
    r.warn_unknown(("guess",))
    g = r.sub("guess")
    names = [s.name for s in species]
    for name in g.table:
        if name not in names:
            g.reject(name, f"not a species (species: {', '.join(names)})")
    return {name: g.number(name) for name in names}


def _domain(r: _Reader) -> Domain:
    r.warn_unknown(("shape", "length", "size", "radius"))
    shape = r.string("shape", choices=SHAPES)
    if shape == "interval":
        return Domain(shape, (r.number("length", positive=True),))
    if shape == "disk":
        return Domain(shape, (r.number("radius", positive=True),))
    size = r.get("size")
    if not (isinstance(size, list) and len(size) == 2 and all(_is_number(v) and v > 0 for v in size)):
        r.reject("size", f"expected [Lx, Ly] with two positive numbers, got {size!r}")
    return Domain(shape, (float(size[0]), float(size[1])))


def _sweep(r: _Reader, parameters: Mapping[str, float]) -> Sweep:
    r.warn_unknown(("parameter", "values"))
    name = r.string("parameter")
    if name not in parameters:
        r.reject("parameter", f"expected one of the parameters ({', '.join(parameters)}), got {name!r}")
    values = r.get("values")
    if isinstance(values, list):
        if not values or not all(_is_number(v) for v in values):
            r.reject("values", f"expected a non-empty list of numbers, got {values!r}")
        return Sweep(name, tuple(float(v) for v in values))
    if isinstance(values, Mapping):
        v = r.sub("values")
        v.warn_unknown(("start", "stop", "num", "spacing"))
        start, stop, num = v.number("start"), v.number("stop"), v.integer("num")
        spacing = v.string("spacing", "linear", choices=("linear", "log"))
        if spacing == "log":
            if start <= 0 or stop <= 0:
                v.reject("spacing", "log spacing needs positive `start` and `stop`")
            grid = np.geomspace(start, stop, num)
        else:
            grid = np.linspace(start, stop, num)
        return Sweep(name, tuple(float(x) for x in grid))
    r.reject("values", f"expected {{ start, stop, num }} or a list of numbers, got {values!r}")


def _pulse(r: _Reader, species: Sequence[SpeciesSpec]) -> PulseSpec:
    r.warn_unknown(("species", "width", "where", "compensate", "height"))
    names = [s.name for s in species]
    chosen = r.get("species")
    if isinstance(chosen, str):
        chosen = [chosen]
    if not (isinstance(chosen, list) and chosen and all(isinstance(c, str) for c in chosen)):
        r.reject("species", f"expected a list of species names, got {chosen!r}")
    for c in chosen:
        if c not in names:
            r.reject("species", f"{c!r} is not a species (species: {', '.join(names)})")
    where = r.get("where", "edge")
    if isinstance(where, str):
        if where == "center":
            where = "centre"
        if where not in PLACES:
            r.reject("where", f"expected edge, centre or a point [x] / [x, y], got {where!r}")
    elif isinstance(where, list) and 1 <= len(where) <= 2 and all(_is_number(v) for v in where):
        where = tuple(float(v) for v in where)
    else:
        r.reject("where", f"expected edge, centre or a point [x] / [x, y], got {where!r}")
    height = r.number("height") if "height" in r.table else None
    return PulseSpec(tuple(chosen), r.number("width", positive=True), where, r.boolean("compensate", True),
                     height)


def _noise(r: _Reader) -> NoiseSpec:
    r.warn_unknown(("amplitude", "seed"))
    return NoiseSpec(r.number("amplitude", positive=True), r.integer("seed", 1, minimum=0))


def _solver(r: _Reader) -> SolverSpec:
    known = ("cells_1d", "cells_2d", "t_end", "rtol", "atol", "method", "settle_tol", "settle_window", "snapshots",
             "polish", "stability")
    r.warn_unknown(known)
    return SolverSpec(
        cells_1d=r.integer("cells_1d", 400, minimum=4),
        cells_2d=r.integer("cells_2d", 64, minimum=4),
        t_end=r.number("t_end", 2000.0, positive=True),
        rtol=r.number("rtol", 1e-4, positive=True),
        atol=r.number("atol", 1e-8, positive=True),
        method=r.string("method", "fv", choices=("fv", "p1")),
        settle_tol=r.number("settle_tol", 1e-6, positive=True),
        settle_window=r.number("settle_window", 50.0, positive=True),
        snapshots=r.integer("snapshots", 101, minimum=2),
        polish=r.boolean("polish", False),
        stability=r.boolean("stability", False),
    )
