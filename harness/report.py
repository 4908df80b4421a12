"""`rdcheck report`: agreement of the spike-limit prediction with the full PDE, as tables, figures and a page.

Input is plain data: the "study" document written by `rdcheck validate` (see the validation data contract)
and the run records it names, ``{key: RunRecord}``. :func:`report_store` opens one or more stores, merges them
in memory and writes everything to one folder.

Agreement rules
---------------
Patterned means an outcome in ``PATTERNED`` (``stationary-pattern``, ``dynamic-pattern``). Each sweep point
and each dimension gets ``agree`` true, false or empty (no verdict) from the predicted regime:

- ``self-patterning`` agrees when the noise start patterns;
- ``pulse-triggered`` agrees when the noise start stays at ``baseline`` and some pulse patterns;
- ``no-pattern`` agrees when the noise start and every pulse return to ``baseline``;
- ``self-oscillating`` agrees when the noise start ends ``dynamic-pattern`` or ``oscillating-uniform``;
- ``unresolved`` (or a point without prediction): no verdict, agree empty.

A run that ends ``unsettled`` (or is missing from the records) never decides anything. A run that ends
``diverged`` contradicts a claim that it returns to ``baseline`` (it certainly left the baseline) and decides
nothing about a claim that it patterns or oscillates. A claim about several runs is false as soon as one
conclusive run contradicts it, true when the runs it needs confirm it, and empty otherwise; so a point with no
conclusive run has agree empty. ``turing_unstable`` (the linear prediction at the case's own diffusion ratio
and domain) is shown beside the verdict and does not enter it.

Columns
-------
One row per sweep point, in this order: the sweep parameter (its value), ``regime``, ``turing_unstable``,
``threshold_lpa``, then for each dimension ``noise_<d>d``, ``pulse_<d>d``, ``threshold_low_<d>d``,
``threshold_high_<d>d``, ``agree_<d>d``; then the extras ``well_mixed_stable`` and per dimension
``threshold_status_<d>d``, ``threshold_held_<d>d`` (did the refined-grid bracket agree; empty if not refined),
``pulse_height_<d>d`` (the height whose outcome ``pulse_<d>d`` shows) and ``pulses_<d>d`` (every pulse tried,
``height outcome; ...``). ``pulse_<d>d`` is the outcome of the lowest pulse that patterned, else of the
largest pulse tried. The threshold bracket is ``low`` (highest pulse that did not pattern) and ``high``
(lowest that did) at the study's resolution. ``agreement.csv`` holds every column; ``agreement.md`` and
``agreement.tex`` hold the contract columns plus ``threshold_held_<d>d``.

Files
-----
``agreement.{md,csv,tex}``, ``summary.{md,csv,tex}`` (agree / disagree / undecided per regime and dimension),
figures as PNG and PDF: ``regimes`` (bands of predicted regimes, PDE outcomes as markers: shape = outcome,
colour = verdict), ``thresholds`` (LPA threshold and measured brackets), ``runs`` (final states of a few
representative runs), and where the study has them ``boundaries``, ``widths``, ``ratios``; and ``index.html``,
a self-contained page with the tables and the PNG figures.
"""

from __future__ import annotations

import csv
import html
import io
import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .errors import InputError
from .figures import BRANCH_COLOURS, FIELD_MAP, _shade_regimes, rdcheck_style
from .runs import PATTERNED, RunRecord, verdict

__all__ = [
    "DIM_COLOURS",
    "FORMATS",
    "OUTCOME_MARKERS",
    "REGIMES",
    "DimRuns",
    "agreement",
    "agreement_rows",
    "caption",
    "dim_runs",
    "load_stores",
    "parse_formats",
    "plot_boundaries",
    "plot_ratios",
    "plot_regimes",
    "plot_runs",
    "plot_thresholds",
    "plot_widths",
    "regime_summary",
    "report_store",
    "representative_runs",
    "study_dims",
    "table_columns",
    "tex_escape",
    "to_csv",
    "to_latex",
    "to_markdown",
    "write_figures",
    "write_index",
    "write_report",
    "write_tables",
]

#: Table formats `rdcheck report --format` accepts.
FORMATS = ("md", "csv", "tex")

#: Regime names in the order tables and legends list them.
REGIMES = ("no-pattern", "pulse-triggered", "self-patterning", "self-oscillating", "unresolved")

#: Outcome -> (marker, filled). Filled: a pattern, or the solid marks of `diverged` and `unsettled`; shapes are
#: our own choice.
OUTCOME_MARKERS = {
    "baseline": ("o", False),
    "other-uniform": ("s", False),
    "oscillating-uniform": ("v", False),
    "stationary-pattern": ("D", True),
    "dynamic-pattern": ("^", True),
    "diverged": ("X", True),
    "unsettled": ("$?$", True),
}

#: One colour per dimension (distinct from each other and from the local-branch orange under colour-vision
#: deficiencies).
DIM_COLOURS = {1: BRANCH_COLOURS["global"], 2: BRANCH_COLOURS["periodic"]}

#: Marker colours by agreement verdict: agree, disagree, no verdict.
AGREE_COLOURS = {True: BRANCH_COLOURS["global"], False: BRANCH_COLOURS["local"], None: "#8a8a8a"}

#: Line colours for species profiles (cycled).
SPECIES_COLOURS = ("#1f5f8b", "#c8621b", "#3a7d44", "#6b4c9a", "#8c2d04", "#5b5b5b")

_REL = 1e-12


# ---------------------------------------------------------------------------------------------------------
# agreement


@dataclass(frozen=True)
class DimRuns:
    """The outcomes of one point's runs in one dimension (``None``: run not made or not in the records).

    Pulse heights are signed start values (a downward pulse is negative); "lowest" means smallest magnitude.
    """

    noise: str | None
    pulses: tuple[tuple[float, str | None], ...]

    @property
    def pulse_summary(self) -> tuple[float | None, str | None]:
        """(height, outcome) of the lowest pulse that patterned, else of the largest pulse tried."""
        tried = [(h, o) for h, o in self.pulses if o is not None]
        patterned = [(h, o) for h, o in tried if o in PATTERNED]
        if patterned:
            return min(patterned, key=lambda t: abs(t[0]))
        if tried:
            return max(tried, key=lambda t: abs(t[0]))
        return None, None


def dim_runs(point: dict, dim: int, records: dict[str, RunRecord]) -> DimRuns:
    """Look up the outcomes of a study point's noise and pulse runs in dimension ``dim``, pulses by height."""
    entry = (point.get("runs") or {}).get(str(dim)) or {}

    def outcome(key: str | None) -> str | None:
        rec = records.get(key) if key is not None else None
        return None if rec is None else rec.outcome

    pulses = tuple(sorted(((float(h), outcome(k)) for h, k in entry.get("pulses") or ()), key=lambda t: abs(t[0])))
    return DimRuns(outcome(entry.get("noise")), pulses)


def _holds(outcome: str | None, claim: str) -> bool | None:
    """Whether one run confirms ``claim`` (``pattern``, ``baseline``, ``oscillation``); None: no verdict."""
    if outcome is None or outcome == "unsettled":
        return None
    if outcome == "diverged":
        return False if claim == "baseline" else None
    if claim == "pattern":
        return outcome in PATTERNED
    if claim == "oscillation":
        return outcome in ("dynamic-pattern", "oscillating-uniform")
    return outcome == "baseline"


def _all(verdicts: Iterable[bool | None]) -> bool | None:
    v = list(verdicts)
    if False in v:
        return False
    return True if v and all(x is True for x in v) else None


def _any(verdicts: Iterable[bool | None]) -> bool | None:
    v = list(verdicts)
    if True in v:
        return True
    return False if v and all(x is False for x in v) else None


def agreement(regime: str | None, runs: DimRuns) -> bool | None:
    """The agreement verdict of one point in one dimension (rules in the module docstring)."""
    pulses = [_holds(o, "pattern") for _, o in runs.pulses]
    if regime == "self-patterning":
        return _holds(runs.noise, "pattern")
    if regime == "self-oscillating":
        return _holds(runs.noise, "oscillation")
    if regime == "no-pattern":
        return _all([_holds(runs.noise, "baseline"), *(_holds(o, "baseline") for _, o in runs.pulses)])
    if regime == "pulse-triggered":
        return _all([_holds(runs.noise, "baseline"), _any(pulses)])
    return None


def _close(a: float, b: float) -> bool:
    return abs(a - b) <= _REL * max(abs(a), abs(b), 1e-300)


def _prediction_point(study: dict, point: dict) -> dict:
    """The predict point of a study point: by index when its value matches, else by value; {} if none."""
    preds = (study.get("prediction") or {}).get("points") or []
    name, value = study.get("sweep_parameter"), float(point["value"])

    def value_of(p: dict) -> float | None:
        v = (p.get("params") or {}).get(name)
        return None if v is None else float(v)

    i = point.get("index")
    if isinstance(i, int) and 0 <= i < len(preds) and (value_of(preds[i]) is None or
                                                       _close(value_of(preds[i]), value)):
        return preds[i]
    return next((p for p in preds if value_of(p) is not None and _close(value_of(p), value)), {})


def study_dims(study: dict) -> list[int]:
    """The dimensions the study ran, ascending."""
    return sorted(int(d) for d in study.get("dims") or [])


def agreement_rows(study: dict, records: dict[str, RunRecord]) -> list[dict]:
    """One row per sweep point (ordered by sweep value), columns as in the module docstring.

    Values are typed: numbers as float, verdicts as bool, missing as None, ``pulses_<d>d`` as a tuple of
    (height, outcome); the writers render them (``true``/``false``/empty).
    """
    name = study.get("sweep_parameter")
    if not name:
        msg = "`study` has no `sweep_parameter`."
        raise InputError(msg)
    dims = study_dims(study)
    rows = []
    for point in sorted(study.get("points") or [], key=lambda p: float(p["value"])):
        pred = _prediction_point(study, point)
        regime = pred.get("regime")
        row: dict = {name: float(point["value"]), "regime": regime,
                     "turing_unstable": pred.get("turing_unstable"), "threshold_lpa": pred.get("threshold")}
        extras: dict = {"well_mixed_stable": pred.get("well_mixed_stable")}
        for d in dims:
            runs = dim_runs(point, d, records)
            height, pulse = runs.pulse_summary
            th = (point.get("threshold") or {}).get(str(d)) or {}
            refined = th.get("refined") or {}
            row |= {f"noise_{d}d": runs.noise, f"pulse_{d}d": pulse, f"threshold_low_{d}d": th.get("low"),
                    f"threshold_high_{d}d": th.get("high"), f"agree_{d}d": agreement(regime, runs)}
            extras |= {f"threshold_status_{d}d": th.get("status"), f"threshold_held_{d}d": refined.get("held"),
                       f"pulse_height_{d}d": height,
                       f"pulses_{d}d": tuple((h, o or "missing") for h, o in runs.pulses)}
        rows.append(row | extras)
    return rows


def table_columns(study: dict, full: bool = True) -> list[str]:
    """Column names in table order; ``full=False`` gives the md/tex subset (contract columns + held)."""
    dims = study_dims(study)
    cols = [study["sweep_parameter"], "regime", "turing_unstable", "threshold_lpa"]
    for d in dims:
        cols += [f"noise_{d}d", f"pulse_{d}d", f"threshold_low_{d}d", f"threshold_high_{d}d", f"agree_{d}d"]
    if not full:
        return cols + [f"threshold_held_{d}d" for d in dims]
    cols.append("well_mixed_stable")
    for d in dims:
        cols += [f"threshold_status_{d}d", f"threshold_held_{d}d", f"pulse_height_{d}d", f"pulses_{d}d"]
    return cols


#: Summary label of points that have no prediction.
NO_PREDICTION = "(no prediction)"

SUMMARY_COLUMNS = ("regime", "dim", "points", "agree", "disagree", "undecided", "agree_fraction")


def regime_summary(study: dict, rows: Sequence[dict]) -> list[dict]:
    """Counts of agree / disagree / no verdict per regime and dimension, with the agreeing fraction."""
    out = []
    present = {r["regime"] or NO_PREDICTION for r in rows}
    regimes = [g for g in REGIMES if g in present] + sorted(present - set(REGIMES))
    for regime in regimes:
        mine = [r for r in rows if (r["regime"] or NO_PREDICTION) == regime]
        for d in study_dims(study):
            verdicts = [r[f"agree_{d}d"] for r in mine]
            agree, disagree = verdicts.count(True), verdicts.count(False)
            decided = agree + disagree
            out.append({"regime": regime, "dim": d, "points": len(mine), "agree": agree, "disagree": disagree,
                        "undecided": len(mine) - decided, "agree_fraction": agree / decided if decided else None})
    return out


# ---------------------------------------------------------------------------------------------------------
# writers


def _cell(v, digits: int) -> str:
    """One value as table text: empty for None, ``true``/``false``, numbers to ``digits`` significant."""
    if v is None:
        return ""
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return f"{float(v):.{digits}g}" if math.isfinite(v) else ""
    if isinstance(v, tuple):
        return "; ".join(f"{_cell(h, digits)} {o}" for h, o in v)
    return str(v)


def _text_rows(rows: Sequence[dict], cols: Sequence[str], digits: int) -> list[list[str]]:
    return [[_cell(r.get(c), digits) for c in cols] for r in rows]


def to_csv(rows: Sequence[dict], cols: Sequence[str]) -> str:
    """CSV text with a header row; numbers to 12 significant digits."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(cols)
    writer.writerows(_text_rows(rows, cols, 12))
    return buf.getvalue()


def _md_escape(s: str) -> str:
    return s.replace("|", "\\|")


def to_markdown(rows: Sequence[dict], cols: Sequence[str], title: str | None = None) -> str:
    """A Markdown (pipe) table, numbers to 4 significant digits, optionally under a ``###`` title."""
    body = _text_rows(rows, cols, 4)
    lines = [f"### {title}", ""] if title else []
    lines.append("| " + " | ".join(_md_escape(c) for c in cols) + " |")
    lines.append("|" + "|".join("---" for _ in cols) + "|")
    lines += ["| " + " | ".join(_md_escape(v) for v in r) + " |" for r in body]
    return "\n".join(lines) + "\n"


_TEX_SPECIALS = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
                 "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}"}


def tex_escape(s: str) -> str:
    """Text with LaTeX's special characters escaped."""
    return "".join(_TEX_SPECIALS.get(ch, ch) for ch in s)


def _domain_text(study: dict, d: int) -> str:
    dom = (study.get("domain") or {}).get(str(d)) or {}
    size = " x ".join(f"{float(s):g}" for s in dom.get("size") or [])
    return f"{dom.get('shape', '?')} {size}".strip()


def caption(study: dict) -> str:
    """Plain-text description of the run settings: resolution and domain per dimension, ratio, tolerance."""
    dims = study_dims(study)
    res = ", ".join(f"{(study.get('resolution') or {}).get(str(d), '?')} ({d}D)" for d in dims)
    dom = ", ".join(f"{_domain_text(study, d)} ({d}D)" for d in dims)
    ratio = study.get("diffusion_ratio")
    tol = study.get("tolerance", 0.02)
    parts = [f"{study.get('model', 'model')}: spike-limit regimes against the full PDE over "
             f"{study['sweep_parameter']}", f"resolution {res}", f"domain {dom}",
             f"diffusion ratio {'?' if ratio is None else f'{float(ratio):.4g}'}",
             f"threshold brackets to {float(tol):g} relative"]
    return "; ".join(parts) + "."


def to_latex(rows: Sequence[dict], cols: Sequence[str], caption_text: str, label: str) -> str:
    """A booktabs table (needs ``\\usepackage{booktabs}``), every cell and the caption escaped."""
    body = _text_rows(rows, cols, 4)
    align = "".join("r" if _numeric(rows, c) else "l" for c in cols)
    lines = [r"\begin{table}[htbp]", r"\centering", r"\small",
             rf"\caption{{{tex_escape(caption_text)}}}", rf"\label{{{label}}}",
             rf"\begin{{tabular}}{{{align}}}", r"\toprule",
             " & ".join(tex_escape(c) for c in cols) + r" \\", r"\midrule"]
    lines += [" & ".join(tex_escape(v) for v in r) + r" \\" for r in body]
    lines += [r"\bottomrule", r"\end{tabular}", r"\end{table}"]
    return "\n".join(lines) + "\n"


def _numeric(rows: Sequence[dict], col: str) -> bool:
    vals = [r.get(col) for r in rows if r.get(col) is not None]
    return bool(vals) and all(isinstance(v, (int, float, np.number)) and not isinstance(v, bool) for v in vals)


def parse_formats(text: str | Sequence[str] | None) -> tuple[str, ...]:
    """``md,csv,tex`` (any subset, any order) as a tuple; None gives all three."""
    if text is None:
        return FORMATS
    items = [s.strip() for s in (text.split(",") if isinstance(text, str) else text) if s.strip()]
    bad = [s for s in items if s not in FORMATS]
    if bad or not items:
        got = ",".join(bad) if bad else "nothing"
        msg = f"`--format` must be a comma-separated subset of {','.join(FORMATS)}, got {got}."
        raise InputError(msg)
    return tuple(dict.fromkeys(items))


def write_tables(study: dict, rows: Sequence[dict], out_dir: Path, formats: Sequence[str]) -> list[Path]:
    """``agreement.*`` and ``summary.*`` in the chosen formats."""
    summary = regime_summary(study, rows)
    full, compact = table_columns(study), table_columns(study, full=False)
    cap = caption(study)
    writers: dict[str, Callable[[], tuple[str, str]]] = {
        "csv": lambda: (to_csv(rows, full), to_csv(summary, SUMMARY_COLUMNS)),
        "md": lambda: (to_markdown(rows, compact, "Agreement per sweep point"),
                       to_markdown(summary, SUMMARY_COLUMNS, "Agreement per regime")),
        "tex": lambda: (to_latex(rows, compact, cap, "tab:rdcheck-agreement"),
                        to_latex(summary, SUMMARY_COLUMNS, "Agreement per regime and dimension. " + cap,
                                 "tab:rdcheck-summary")),
    }
    paths = []
    for fmt in formats:
        agree_text, summary_text = writers[fmt]()
        for stem, text in (("agreement", agree_text), ("summary", summary_text)):
            path = out_dir / f"{stem}.{fmt}"
            path.write_text(text, encoding="utf-8")
            paths.append(path)
    return paths


# ---------------------------------------------------------------------------------------------------------
# figures


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(fig, stem: Path) -> list[Path]:
    """Save ``fig`` as ``stem.png`` and ``stem.pdf`` and close it."""
    paths = [stem.with_suffix(".png"), stem.with_suffix(".pdf")]
    for p in paths:
        fig.savefig(p)
    _pyplot().close(fig)
    return paths


def _sweep(study: dict, rows: Sequence[dict]) -> tuple[np.ndarray, list[str]]:
    x = np.array([r[study["sweep_parameter"]] for r in rows], dtype=float)
    return x, [str(r["regime"] or "unresolved") for r in rows]


def _shade(ax, x: np.ndarray, regimes: Sequence[str]) -> None:
    if len(x):
        _shade_regimes(ax, x, regimes)


def plot_regimes(study: dict, rows: Sequence[dict], stem: Path) -> list[Path]:
    """Predicted regimes as bands along the sweep; PDE outcomes as markers, one row per dimension and start.

    Marker shape is the outcome (filled: patterned), colour the agreement verdict of that dimension.
    """
    plt = _pyplot()
    x, regimes = _sweep(study, rows)
    lanes = [(d, kind) for d in study_dims(study) for kind in ("noise", "pulse")]
    with rdcheck_style():
        fig, ax = plt.subplots(figsize=(6.4, 1.2 + 0.45 * len(lanes)))
        _shade(ax, x, regimes)
        seen = set()
        for j, (d, kind) in enumerate(lanes):
            for xi, r in zip(x, rows):
                o = r.get(f"{kind}_{d}d")
                if o is None:
                    continue
                marker, filled = OUTCOME_MARKERS.get(o, ("*", True))
                colour = AGREE_COLOURS[r.get(f"agree_{d}d")]
                ax.plot(xi, j, ls="none", marker=marker, ms=6, color=colour, mfc=colour if filled else "none")
                seen.add(o)
        for o in (o for o in OUTCOME_MARKERS if o in seen):
            marker, filled = OUTCOME_MARKERS[o]
            ax.plot([], [], ls="none", marker=marker, color="#333333", mfc="#333333" if filled else "none", label=o)
        for verdict, text in ((True, "agrees"), (False, "disagrees"), (None, "no verdict")):
            ax.plot([], [], "s", ms=6, color=AGREE_COLOURS[verdict], ls="none", label=text)
        ax.set_yticks(range(len(lanes)), [f"{d}D {kind}" for d, kind in lanes])
        ax.set_ylim(-0.6, len(lanes) - 0.4)
        ax.invert_yaxis()
        ax.set_xlabel(study["sweep_parameter"])
        ax.set_title(f"{study.get('model', '')}: predicted regimes and PDE outcomes")
        ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=7.5)
        return _save(fig, stem)


def plot_thresholds(study: dict, rows: Sequence[dict], stem: Path) -> list[Path]:
    """LPA threshold along the sweep and the measured brackets as vertical intervals, one colour per dimension.

    A bracket is solid when the refined grid confirmed it (or it was not refined), dashed when refinement moved
    it; a one-sided bracket is a triangle at its bound (up: no pattern up to there, down: patterned from there).
    """
    plt = _pyplot()
    x, regimes = _sweep(study, rows)
    dims = study_dims(study)
    step = float(np.min(np.diff(np.unique(x)))) if len(np.unique(x)) > 1 else 1.0
    with rdcheck_style():
        fig, ax = plt.subplots()
        _shade(ax, x, regimes)
        lpa = np.array([np.nan if r["threshold_lpa"] is None else r["threshold_lpa"] for r in rows], dtype=float)
        ax.plot(x, lpa, "-", color=BRANCH_COLOURS["local"], marker="o", ms=3.5, label="LPA threshold")
        for k, d in enumerate(dims):
            colour = DIM_COLOURS.get(d, "#333333")
            shift = (k - (len(dims) - 1) / 2) * 0.15 * step
            for xi, r in zip(x + shift, rows):
                lo, hi = r[f"threshold_low_{d}d"], r[f"threshold_high_{d}d"]
                ls = "--" if r.get(f"threshold_held_{d}d") is False else "-"
                if lo is not None and hi is not None:
                    ax.plot([xi, xi], [lo, hi], ls, color=colour, lw=2.2, solid_capstyle="butt")
                elif lo is not None:
                    ax.plot(xi, lo, "^", color=colour, ms=5, mfc="none")
                elif hi is not None:
                    ax.plot(xi, hi, "v", color=colour, ms=5)
            ax.plot([], [], "-", color=colour, lw=2.2, label=f"{d}D bracket")
        ax.plot([], [], "--", color="#333333", lw=2.2, label="moved on refinement")
        ax.plot([], [], "^", color="#333333", mfc="none", ls="none", label="no pattern up to")
        ax.plot([], [], "v", color="#333333", ls="none", label="patterned from")
        ax.set_xlabel(study["sweep_parameter"])
        ax.set_ylabel("pulse height")
        ax.set_title(f"{study.get('model', '')}: predicted and measured pulse thresholds")
        ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
        return _save(fig, stem)


def representative_runs(study: dict, records: dict[str, RunRecord], limit: int = 6) -> list[RunRecord]:
    """A few runs to show: the first of each distinct outcome (noise starts first, lowest dimension first),
    then, while there is room, the same outcomes in the other dimensions, patterns first."""
    first: dict[tuple[str, int], RunRecord] = {}
    for point in sorted(study.get("points") or [], key=lambda p: float(p["value"])):
        for d in study_dims(study):
            entry = (point.get("runs") or {}).get(str(d)) or {}
            for k in [entry.get("noise"), *(k for _, k in entry.get("pulses") or ())]:
                rec = records.get(k) if k is not None else None
                if rec is not None and rec.final.size:
                    first.setdefault((rec.outcome, d), rec)
    order = {o: i for i, o in enumerate(OUTCOME_MARKERS)}
    outcomes = sorted({o for o, _ in first}, key=lambda o: order.get(o, len(order)))
    lead = [min((d for o2, d in first if o2 == o)) for o in outcomes]
    chosen = [first[o, d] for o, d in zip(outcomes, lead)]
    rest = sorted((key for key in first if key not in set(zip(outcomes, lead))),
                  key=lambda key: (key[0] not in PATTERNED, order.get(key[0], len(order)), key[1]))
    return (chosen + [first[key] for key in rest])[:limit]


def _slow_index(study: dict) -> int:
    slow = (study.get("prediction") or {}).get("slow") or []
    return next((i for i, s in enumerate(slow) if s), 0)


def _colour_limits(values: np.ndarray) -> tuple[float, float]:
    """Colour range of a field, at least 1e-6 of its size wide, so round-off never shows as a pattern."""
    lo, hi = float(np.min(values)), float(np.max(values))
    mid, half = 0.5 * (lo + hi), 0.5 * max(hi - lo, 1e-6 * max(abs(lo), abs(hi), 1e-12))
    return mid - half, mid + half


def plot_runs(study: dict, runs: Sequence[RunRecord], stem: Path) -> list[Path]:
    """Final states of a few runs: 1D profiles of every species; 2D the first slow species on its nodes."""
    import matplotlib.tri as mtri

    plt = _pyplot()
    species = study.get("species") or []
    name = study["sweep_parameter"]
    n = max(len(runs), 1)
    cols = min(n, 3)
    nrows = math.ceil(n / cols)
    with rdcheck_style():
        fig, axes = plt.subplots(nrows, cols, figsize=(3.3 * cols, 2.8 * nrows), squeeze=False)
        for ax in axes.flat[len(runs):]:
            ax.set_axis_off()
        for ax, rec in zip(axes.flat, runs):
            t = rec.task
            value = t.param_dict.get(name, float("nan"))
            ax.set_title(f"{name} = {value:.4g}, {t.dim}D {t.start_kind} {t.start_value:.3g}\n{rec.outcome}",
                         fontsize=8.5)
            if rec.coords.shape[1] == 1:
                xs = rec.coords[:, 0]
                order = np.argsort(xs)
                for i, row in enumerate(rec.final):
                    label = species[i] if i < len(species) else f"species {i}"
                    ax.plot(xs[order], row[order], "-", color=SPECIES_COLOURS[i % len(SPECIES_COLOURS)],
                            label=label)
                ax.set_xlabel("x")
                ax.legend(fontsize=7)
            else:
                i = _slow_index(study)
                tri = mtri.Triangulation(rec.coords[:, 0], rec.coords[:, 1])
                lo, hi = _colour_limits(rec.final[i])
                art = ax.tripcolor(tri, rec.final[i], shading="gouraud", cmap=FIELD_MAP, vmin=lo, vmax=hi)
                ax.set_aspect("equal")
                ax.set_axis_off()
                fig.colorbar(art, ax=ax, shrink=0.8, format="%.6g", label=species[i] if i < len(species) else None)
        fig.suptitle(f"{study.get('model', '')}: final states of representative runs", x=0.01, ha="left",
                     fontsize=10, fontweight="bold")
        fig.tight_layout()
        return _save(fig, stem)


def _behaviour(outcome) -> str:
    """A boundary side as text: an outcome name, or the driver's (noise patterned, some pulse patterned)."""
    if isinstance(outcome, (list, tuple)) and len(outcome) == 2:
        noise, pulse = outcome
        return "noise patterns" if noise else "pulse patterns" if pulse else "no pattern"
    return str(outcome)


def plot_boundaries(study: dict, rows: Sequence[dict], stem: Path) -> list[Path]:
    """Measured regime-boundary brackets on the sweep axis beside the spike-limit and linear boundaries."""
    plt = _pyplot()
    x, regimes = _sweep(study, rows)
    bounds = study.get("boundaries") or []
    with rdcheck_style():
        fig, ax = plt.subplots(figsize=(6.4, 1.2 + 0.4 * max(len(bounds), 1)))
        _shade(ax, x, regimes)
        for j, b in enumerate(bounds):
            colour = DIM_COLOURS.get(int(b["dim"]), "#333333")
            ax.plot([b["low"], b["high"]], [j, j], "-", color=colour, lw=4, solid_capstyle="butt")
            if b.get("spike_limit") is not None:
                ax.plot(b["spike_limit"], j, "|", color=BRANCH_COLOURS["local"], ms=14, mew=2)
            if b.get("linear") is not None:
                ax.plot(b["linear"], j, "x", color="#333333", ms=7, mew=1.5)
        for d in sorted({int(b["dim"]) for b in bounds}):
            ax.plot([], [], "-", color=DIM_COLOURS.get(d, "#333333"), lw=4, label=f"{d}D PDE bracket")
        ax.plot([], [], "|", color=BRANCH_COLOURS["local"], ms=10, mew=2, ls="none", label="spike limit")
        ax.plot([], [], "x", color="#333333", ls="none", label="linear")
        labels = [f"{b['dim']}D: {' | '.join(_behaviour(o) for o in b.get('outcomes') or [])}" for b in bounds]
        ax.set_yticks(range(len(bounds)), labels, fontsize=7.5)
        ax.set_ylim(-0.6, max(len(bounds), 1) - 0.4)
        ax.set_xlabel(study["sweep_parameter"])
        ax.set_title(f"{study.get('model', '')}: regime boundaries")
        ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
        return _save(fig, stem)


def plot_widths(study: dict, rows: Sequence[dict], stem: Path) -> list[Path]:
    """Pulse height needed against pulse width (measured brackets) with the LPA threshold of each point."""
    plt = _pyplot()
    entries = study.get("widths") or []
    name = study["sweep_parameter"]
    by_index = {int(p["index"]): p for p in study.get("points") or [] if "index" in p}
    groups = sorted({(int(e["dim"]), int(e["index"])) for e in entries})
    with rdcheck_style():
        fig, ax = plt.subplots()
        for k, (d, i) in enumerate(groups):
            colour = SPECIES_COLOURS[k % len(SPECIES_COLOURS)]
            mine = sorted((e for e in entries if (int(e["dim"]), int(e["index"])) == (d, i)),
                          key=lambda e: e["width"])
            for e in mine:
                lo, hi = e.get("low"), e.get("high")
                if lo is not None and hi is not None:
                    ax.plot([e["width"]] * 2, [lo, hi], "-", color=colour, lw=2.2, solid_capstyle="butt")
                elif lo is not None:
                    ax.plot(e["width"], lo, "^", color=colour, mfc="none")
                elif hi is not None:
                    ax.plot(e["width"], hi, "v", color=colour)
            mids = [(e["width"], 0.5 * (e["low"] + e["high"])) for e in mine
                    if e.get("low") is not None and e.get("high") is not None]
            if mids:  # brackets are a few per cent wide: a line through their middles shows the trend
                ax.plot(*zip(*mids), "-o", color=colour, lw=1.0, ms=3.5)
            point = by_index.get(i)
            value = float(point["value"]) if point else float("nan")
            lpa = _prediction_point(study, point).get("threshold") if point else None
            if lpa is not None:
                ax.axhline(lpa, color=colour, lw=1.0, ls=(0, (1, 1)))
            ax.plot([], [], "-", color=colour, lw=2.2, label=f"{d}D, {name} = {value:.4g}")
        ax.plot([], [], color="#333333", lw=1.0, ls=(0, (1, 1)), label="LPA threshold")
        widths = [float(e["width"]) for e in entries if float(e["width"]) > 0]
        if widths and max(widths) > 10 * min(widths):
            ax.set_xscale("log")
        ax.set_xlabel("pulse width")
        ax.set_ylabel("pulse height needed")
        ax.set_title(f"{study.get('model', '')}: threshold against pulse width")
        ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
        return _save(fig, stem)


def _ratio_threshold(entry: dict) -> tuple[float, float, float] | None:
    """(low, mid, high) of measured/predicted threshold from ``threshold_low/high/lpa`` or ``threshold_ratio``."""
    lpa, lo, hi = entry.get("threshold_lpa"), entry.get("threshold_low"), entry.get("threshold_high")
    if lpa and lo is not None and hi is not None:
        return lo / lpa, 0.5 * (lo + hi) / lpa, hi / lpa
    r = entry.get("threshold_ratio")
    return None if r is None else (r, r, r)


def plot_ratios(study: dict, stem: Path) -> list[Path]:
    """Agreement fraction and measured/predicted threshold against the diffusion ratio (log axis).

    Reads per entry of ``ratios``: ``ratio``, ``agree_fraction`` and, where present, ``threshold_low``,
    ``threshold_high`` and ``threshold_lpa`` (or a ready ``threshold_ratio``).
    """
    plt = _pyplot()
    entries = sorted(study.get("ratios") or [], key=lambda e: e["ratio"])
    r = np.array([e["ratio"] for e in entries], dtype=float)
    frac = np.array([np.nan if e.get("agree_fraction") is None else e["agree_fraction"] for e in entries])
    with rdcheck_style():
        fig, (top, bottom) = plt.subplots(2, 1, sharex=True, figsize=(6.4, 5.0))
        top.plot(r, frac, "-o", color=BRANCH_COLOURS["global"], ms=4)
        top.set_ylim(-0.05, 1.05)
        top.set_ylabel("agreement fraction")
        top.set_title(f"{study.get('model', '')}: agreement against the diffusion ratio")
        for ri, e in zip(r, entries):
            t = _ratio_threshold(e)
            if t is not None:
                bottom.plot([ri, ri], [t[0], t[2]], "-", color=BRANCH_COLOURS["local"], lw=2.2)
                bottom.plot(ri, t[1], "o", color=BRANCH_COLOURS["local"], ms=3.5)
        bottom.axhline(1.0, color="#333333", lw=0.8, ls=(0, (1, 1)))
        bottom.set_ylabel("measured / predicted threshold")
        bottom.set_xlabel("diffusion ratio D_slow / D_fast")
        if len(r) and np.all(r > 0):
            bottom.set_xscale("log")
        return _save(fig, stem)


def write_figures(study: dict, records: dict[str, RunRecord], rows: Sequence[dict], out_dir: Path) -> list[Path]:
    """Every figure the study's data allows, as PNG and PDF."""
    paths = plot_regimes(study, rows, out_dir / "regimes")
    if any(r["threshold_lpa"] is not None or r.get(f"threshold_low_{d}d") is not None
           or r.get(f"threshold_high_{d}d") is not None for r in rows for d in study_dims(study)):
        paths += plot_thresholds(study, rows, out_dir / "thresholds")
    runs = representative_runs(study, records)
    if runs:
        paths += plot_runs(study, runs, out_dir / "runs")
    if study.get("boundaries"):
        paths += plot_boundaries(study, rows, out_dir / "boundaries")
    if study.get("widths"):
        paths += plot_widths(study, rows, out_dir / "widths")
    if study.get("ratios"):
        paths += plot_ratios(study, out_dir / "ratios")
    paths += plot_diagram(study, rows, out_dir / "diagram")
    return paths


def plot_diagram(study: dict, rows: Sequence[dict], stem: Path) -> list[Path]:
    """The reduced system's diagram (`predict --plot`) with the measured 1D outcomes and thresholds overlaid.

    It needs the case file named in the study; where that cannot be read (a report made on another machine)
    the figure is left out with a warning. Periodic orbits are not drawn here (`predict --plot` draws them).
    """
    import warnings

    from .case import load_case
    from .errors import CaseError
    from .figures import plane_path, plot_prediction
    from .model import build_model
    from .predict import predict_case

    try:
        case = load_case(study["case"], study.get("overrides", []))
    except CaseError as exc:
        warnings.warn(f"diagram left out: {exc}", stacklevel=2)
        return []
    model = build_model(case)
    points = predict_case(case, model)
    name = study["sweep_parameter"]
    measured = {}
    for r in rows:
        noise = r.get("noise_1d")
        measured[float(r[name])] = {
            "noise": None if noise is None else verdict(noise),
            "low": r.get("threshold_low_1d"), "high": r.get("threshold_high_1d")}
    paths = []
    for ext in ("png", "pdf"):
        path = stem.with_suffix(f".{ext}")
        plot_prediction(case, model, points, str(path), cycles=(), measured=measured)
        paths += [path, Path(plane_path(str(path)))]
    return paths


# ---------------------------------------------------------------------------------------------------------
# page

_CSS = ("body{font-family:sans-serif;max-width:76rem;margin:1.5rem auto;padding:0 1rem;color:#222}"
        "table{border-collapse:collapse;font-size:.8rem;margin:.5rem 0 1.5rem}"
        "th,td{border-bottom:1px solid #ccc;padding:.15rem .5rem;text-align:left}"
        "th{border-bottom:2px solid #444}td.true{color:#1f5f8b;font-weight:bold}"
        "td.false{color:#c8621b;font-weight:bold}img{max-width:100%;margin:.5rem 0 1rem}"
        "p.meta{color:#555}")


def _html_table(rows: Sequence[dict], cols: Sequence[str]) -> str:
    head = "".join(f"<th>{html.escape(c)}</th>" for c in cols)
    body = []
    verdict = [c.startswith("agree_") for c in cols]
    for r in _text_rows(rows, cols, 4):
        cells = "".join(f'<td class="{v}">{v}</td>' if is_verdict and v in ("true", "false")
                        else f"<td>{html.escape(v)}</td>" for v, is_verdict in zip(r, verdict))
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def write_index(study: dict, rows: Sequence[dict], figures: Sequence[Path], out_dir: Path,
                date: str | None = None) -> Path:
    """A self-contained ``index.html``: case, date, version, the agreement and summary tables, PNG figures."""
    from . import __version__

    date = date or datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    case = str(study.get("case", ""))
    overrides = " ".join(study.get("overrides") or [])
    images = "".join(f'<img src="{html.escape(p.name)}" alt="{html.escape(p.stem)}">'
                     for p in figures if p.suffix == ".png")
    page = (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>rdcheck report: '
            f"{html.escape(case)}</title><style>{_CSS}</style></head><body>"
            f"<h1>rdcheck report: {html.escape(case)}</h1>"
            f'<p class="meta">model {html.escape(str(study.get("model", "")))}'
            f"{' &middot; overrides ' + html.escape(overrides) if overrides else ''}"
            f" &middot; {html.escape(date)} &middot; rdcheck {html.escape(__version__)}</p>"
            f"<p>{html.escape(caption(study))}</p>"
            f"<h2>Agreement per sweep point</h2>{_html_table(rows, table_columns(study, full=False))}"
            f"<h2>Agreement per regime</h2>{_html_table(regime_summary(study, rows), SUMMARY_COLUMNS)}"
            f"<h2>Figures</h2>{images}</body></html>\n")
    path = out_dir / "index.html"
    path.write_text(page, encoding="utf-8")
    return path


def write_report(study: dict, records: dict[str, RunRecord], out_dir: str | Path,
                 formats: Sequence[str] = FORMATS) -> list[Path]:
    """Tables, figures and ``index.html`` for one study into ``out_dir`` (created); returns the files."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rows = agreement_rows(study, records)
    paths = write_tables(study, rows, out, parse_formats(formats))
    figures = write_figures(study, records, rows, out)
    return [*paths, *figures, write_index(study, rows, figures, out)]


# ---------------------------------------------------------------------------------------------------------
# stores


def load_stores(paths: Sequence[str | Path]) -> tuple[dict, dict[str, RunRecord]]:
    """The merged study and every record of the stores at ``paths``."""
    from .store import Store, merge_studies

    studies, records = [], {}
    for path in paths:
        if not Path(path).exists():
            msg = f"{path}: no such store."
            raise InputError(msg)
        store = Store(str(path))
        study = store.get_doc("study")
        if study is None:
            msg = f"{path}: `study`: the store has no study document (written by `rdcheck validate`)."
            raise InputError(msg)
        studies.append(study)
        records |= {r.key: r for r in store.records()}
    return merge_studies(studies), records


def report_store(paths: str | Path | Sequence[str | Path], out_dir: str | Path,
                 formats: str | Sequence[str] | None = None) -> list[Path]:
    """`rdcheck report`: open the store(s) (several are merged in memory) and write the report to ``out_dir``."""
    paths = [paths] if isinstance(paths, (str, Path)) else list(paths)
    study, records = load_stores(paths)
    return write_report(study, records, out_dir, parse_formats(formats))
