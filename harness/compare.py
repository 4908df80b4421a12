"""`rdcheck compare`: what moved between two validations of the same case (a regression check).

Sweep points are matched by the sweep parameter's value (to 1e-12 relative). A matched point has moved when
its predicted regime changed, when the outcome of its noise start or of a pulse of the same height (to 1e-12
relative) changed in any dimension, when a run is present in one and missing in the other, or when its
threshold bracket moved: the two brackets ``[low, high]`` (an absent end is open) no longer overlap after each
is widened by the bracket tolerance (relative; the current study's ``tolerance``, default 0.02), or one has a
bracket and the other none. Points present in only one study are listed too.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from .report import agreement_rows, load_stores, study_dims
from .runs import RunRecord

__all__ = ["DEFAULT_TOLERANCE", "Change", "brackets_moved", "compare_stores", "compare_studies"]

#: Relative bracket tolerance when the study names none.
DEFAULT_TOLERANCE = 0.02

_REL = 1e-12


@dataclass(frozen=True)
class Change:
    """One thing that moved at one sweep point (``dim`` None for the regime and unmatched points)."""

    value: float
    kind: str  # "regime" | "outcome" | "threshold" | "only-base" | "only-current"
    dim: int | None
    what: str
    before: str
    after: str

    def __str__(self) -> str:
        where = f"{self.dim}D " if self.dim is not None else ""
        return f"{self.value:.10g}: {where}{self.what}: {self.before} -> {self.after}"


def _close(a: float, b: float) -> bool:
    return abs(a - b) <= _REL * max(abs(a), abs(b), 1e-300)


def _widened(low: float | None, high: float | None, tol: float) -> tuple[float, float]:
    lo = -math.inf if low is None else low - tol * abs(low)
    hi = math.inf if high is None else high + tol * abs(high)
    return lo, hi


def brackets_moved(a: tuple[float | None, float | None], b: tuple[float | None, float | None],
                   tol: float) -> bool:
    """Whether two threshold brackets ``(low, high)`` disagree beyond the relative tolerance ``tol``."""
    has_a, has_b = a != (None, None), b != (None, None)
    if has_a != has_b:
        return True
    if not has_a:
        return False
    (alo, ahi), (blo, bhi) = _widened(*a, tol), _widened(*b, tol)
    return not (alo <= bhi and blo <= ahi)


def _text(v) -> str:
    if v is None:
        return "none"
    if isinstance(v, tuple):
        return "[" + ", ".join("-" if x is None else f"{x:.6g}" for x in v) + "]"
    return str(v)


def _match(rows: list[dict], value: float, name: str) -> dict | None:
    return next((r for r in rows if _close(r[name], value)), None)


def _pulse_changes(value: float, d: int, a: tuple, b: tuple) -> list[Change]:
    out = []
    for h, before in a:
        after = next((o for hb, o in b if _close(hb, h)), None)
        if after is not None and after != before:
            out.append(Change(value, "outcome", d, f"pulse {h:.6g}", before, after))
    return out


def _point_changes(name: str, dims: list[int], a: dict, b: dict, tol: float) -> list[Change]:
    value = a[name]
    out = []
    if a["regime"] != b["regime"]:
        out.append(Change(value, "regime", None, "regime", _text(a["regime"]), _text(b["regime"])))
    for d in dims:
        before, after = a.get(f"noise_{d}d"), b.get(f"noise_{d}d")
        if before != after:
            out.append(Change(value, "outcome", d, "noise", _text(before), _text(after)))
        out += _pulse_changes(value, d, a.get(f"pulses_{d}d") or (), b.get(f"pulses_{d}d") or ())
        ba = (a.get(f"threshold_low_{d}d"), a.get(f"threshold_high_{d}d"))
        bb = (b.get(f"threshold_low_{d}d"), b.get(f"threshold_high_{d}d"))
        if brackets_moved(ba, bb, tol):
            out.append(Change(value, "threshold", d, "threshold bracket", _text(ba), _text(bb)))
    return out


def compare_studies(base: tuple[dict, dict[str, RunRecord]], current: tuple[dict, dict[str, RunRecord]],
                    tolerance: float | None = None) -> list[Change]:
    """Every change between two (study, records) pairs, in sweep order (rules in the module docstring)."""
    (sa, ra), (sb, rb) = base, current
    name = sb.get("sweep_parameter")
    if sa.get("sweep_parameter") != name:
        msg = (f"`base` sweeps over {sa.get('sweep_parameter')!r} but `current` over {name!r}: "
               "compare needs the same sweep parameter.")
        raise ValueError(msg)
    tol = float(tolerance if tolerance is not None else sb.get("tolerance", sa.get("tolerance", DEFAULT_TOLERANCE)))
    rows_a, rows_b = agreement_rows(sa, ra), agreement_rows(sb, rb)
    dims = sorted(set(study_dims(sa)) | set(study_dims(sb)))
    changes = []
    for a in rows_a:
        b = _match(rows_b, a[name], name)
        if b is None:
            changes.append(Change(a[name], "only-base", None, "point", "present", "absent"))
        else:
            changes += _point_changes(name, dims, a, b, tol)
    changes += [Change(b[name], "only-current", None, "point", "absent", "present")
                for b in rows_b if _match(rows_a, b[name], name) is None]
    return sorted(changes, key=lambda c: c.value)


def compare_stores(path_a: str | Path, path_b: str | Path) -> tuple[str, int]:
    """`rdcheck compare BASELINE CURRENT`: a readable listing and the exit status (1 if anything moved)."""
    base, current = load_stores([path_a]), load_stores([path_b])
    changes = compare_studies(base, current)
    name = current[0]["sweep_parameter"]
    head = f"rdcheck compare {path_a} -> {path_b} (sweep over {name})"
    if not changes:
        return f"{head}\nno changes\n", 0
    lines = [head, f"{len(changes)} change{'s' if len(changes) != 1 else ''}:", *(f"  {c}" for c in changes)]
    return "\n".join(lines) + "\n", 1
