"""Tests of the report: agreement rows and rules, table writers, figures and the index page."""

from __future__ import annotations

import csv
import io
import re

import numpy as np
import pytest

from harness.errors import InputError
from harness.report import (
    DimRuns,
    agreement,
    agreement_rows,
    caption,
    parse_formats,
    regime_summary,
    representative_runs,
    table_columns,
    tex_escape,
    to_csv,
    to_latex,
    to_markdown,
    write_report,
)


def _row(study, records, value):
    return next(r for r in agreement_rows(study, records) if r["k"] == value)


# agreement rules, one regime at a time ------------------------------------------------------------------

RULES = [
    # regime, noise, pulses, expected
    ("self-patterning", "stationary-pattern", [], True),
    ("self-patterning", "dynamic-pattern", [], True),
    ("self-patterning", "baseline", [], False),
    ("self-patterning", "unsettled", [], None),
    ("self-patterning", "diverged", [], None),
    ("self-patterning", None, [], None),
    ("pulse-triggered", "baseline", ["baseline", "stationary-pattern"], True),
    ("pulse-triggered", "baseline", ["baseline", "baseline"], False),
    ("pulse-triggered", "stationary-pattern", ["stationary-pattern"], False),
    ("pulse-triggered", "diverged", ["stationary-pattern"], False),
    ("pulse-triggered", "baseline", ["baseline", "unsettled"], None),
    ("pulse-triggered", "baseline", ["diverged"], None),
    ("pulse-triggered", "unsettled", ["stationary-pattern"], None),
    ("pulse-triggered", "unsettled", ["baseline"], False),
    ("pulse-triggered", "baseline", [], None),
    ("no-pattern", "baseline", ["baseline", "baseline"], True),
    ("no-pattern", "baseline", [], True),
    ("no-pattern", "baseline", ["baseline", "stationary-pattern"], False),
    ("no-pattern", "other-uniform", ["baseline"], False),
    ("no-pattern", "baseline", ["diverged"], False),
    ("no-pattern", "baseline", ["unsettled"], None),
    ("no-pattern", None, ["baseline"], None),
    ("self-oscillating", "dynamic-pattern", [], True),
    ("self-oscillating", "oscillating-uniform", [], True),
    ("self-oscillating", "stationary-pattern", [], False),
    ("self-oscillating", "baseline", [], False),
    ("self-oscillating", "unsettled", [], None),
    ("unresolved", "stationary-pattern", ["stationary-pattern"], None),
    (None, "baseline", ["baseline"], None),
]


@pytest.mark.parametrize(("regime", "noise", "pulses", "expected"), RULES)
def test_agreement_rules(regime, noise, pulses, expected):
    """Each regime's rule gives true, false or no verdict as the validation contract says."""
    runs = DimRuns(noise, tuple((0.5 * (j + 1), o) for j, o in enumerate(pulses)))
    assert agreement(regime, runs) is expected


def test_rows_apply_rules_per_dimension(study_maker):
    """A contradicting 2D run makes only that dimension disagree; the fixture's defaults all agree."""
    study, records = study_maker({(2, 2): ("baseline", [])})
    rows = agreement_rows(study, records)
    assert [r["agree_1d"] for r in rows] == [True, True, True, True, None]
    assert [r["agree_2d"] for r in rows] == [True, True, False, True, None]


def test_rows_missing_records_give_no_verdict(study_maker):
    """A point whose runs are not in the records has empty outcomes and no verdict."""
    study, records = study_maker()
    kept = {k: v for k, v in records.items() if not k.startswith(("n2-", "n0-1", "p0-1"))}
    row = _row(study, kept, 1.0)
    assert row["noise_1d"] is None and row["agree_1d"] is None and row["agree_2d"] is None
    row = _row(study, kept, 0.5)
    assert row["agree_1d"] is None and row["pulses_1d"] == ((1.0, "missing"), (2.0, "missing"))


def test_pulse_column_lowest_patterned_else_largest(study_maker):
    """`pulse_<d>d` is the lowest pulse that patterned, else the largest tried (by magnitude)."""
    study, records = study_maker({(1, 1): ("baseline", [(2.0, "stationary-pattern"), (0.5, "baseline"),
                                                        (1.0, "dynamic-pattern")]),
                                 (0, 1): ("baseline", [(-1.0, "baseline"), (-3.0, "other-uniform")])})
    row = _row(study, records, 0.75)
    assert (row["pulse_1d"], row["pulse_height_1d"]) == ("dynamic-pattern", 1.0)
    row = _row(study, records, 0.5)
    assert (row["pulse_1d"], row["pulse_height_1d"]) == ("other-uniform", -3.0)
    assert row["agree_1d"] is False  # no-pattern, and a pulse settled elsewhere


def test_rows_carry_prediction_and_thresholds(study_maker):
    """Regime, linear verdict, LPA threshold, bracket and refinement come through from the study."""
    study, records = study_maker()
    row = _row(study, records, 0.75)
    assert row["regime"] == "pulse-triggered" and row["turing_unstable"] is False
    assert row["threshold_lpa"] == 0.8
    assert (row["threshold_low_1d"], row["threshold_high_1d"]) == (0.5, 1.0)
    assert row["threshold_held_1d"] is True and row["threshold_held_2d"] is False
    assert row["threshold_status_1d"] == "bracketed" and row["well_mixed_stable"] is True
    assert _row(study, records, 1.0)["turing_unstable"] is True


def test_prediction_matched_by_value_when_index_differs(study_maker):
    """A point whose index does not match the prediction list is matched by its sweep value."""
    study, records = study_maker()
    study["points"][2]["index"] = 40
    assert _row(study, records, 1.0)["regime"] == "self-patterning"


def test_summary_counts(study_maker):
    """The per-regime summary counts agree, disagree and undecided points per dimension."""
    study, records = study_maker({(2, 2): ("baseline", []), (0, 1): ("unsettled", [(1.0, "baseline")])})
    summary = regime_summary(study, agreement_rows(study, records))
    by = {(s["regime"], s["dim"]): s for s in summary}
    assert (by["self-patterning", 2]["agree"], by["self-patterning", 2]["disagree"]) == (0, 1)
    assert by["no-pattern", 1]["undecided"] == 1 and by["no-pattern", 1]["agree_fraction"] is None
    assert by["unresolved", 1]["undecided"] == 1
    assert [s["regime"] for s in summary[::2]] == ["no-pattern", "pulse-triggered", "self-patterning",
                                                    "self-oscillating", "unresolved"]


# writers ------------------------------------------------------------------------------------------------

CONTRACT = ["k", "regime", "turing_unstable", "threshold_lpa",
            "noise_1d", "pulse_1d", "threshold_low_1d", "threshold_high_1d", "agree_1d",
            "noise_2d", "pulse_2d", "threshold_low_2d", "threshold_high_2d", "agree_2d"]


def test_csv_columns_and_values(study_maker):
    """CSV starts with the contract columns in order and writes true/false/empty and the pulses tried."""
    study, records = study_maker()
    rows = agreement_rows(study, records)
    table = list(csv.DictReader(io.StringIO(to_csv(rows, table_columns(study)))))
    header = list(table[0])
    assert header[:len(CONTRACT)] == CONTRACT
    assert {"well_mixed_stable", "threshold_held_1d", "pulses_1d", "pulse_height_2d"} <= set(header)
    assert [t["agree_1d"] for t in table] == ["true", "true", "true", "true", ""]
    assert table[1]["pulses_1d"] == "0.5 baseline; 1 stationary-pattern; 2 stationary-pattern"
    assert float(table[1]["threshold_lpa"]) == 0.8 and table[0]["threshold_lpa"] == ""


def test_markdown_table_shape(study_maker):
    """The Markdown table has a header, a rule and one line per point, all with the same cell count."""
    study, records = study_maker()
    rows = agreement_rows(study, records)
    text = to_markdown(rows, table_columns(study, full=False))
    lines = [line for line in text.splitlines() if line.startswith("|")]
    assert len(lines) == 2 + len(rows)
    cells = [line.strip("|").split("|") for line in lines]
    assert {len(c) for c in cells} == {len(CONTRACT) + 2}
    assert [c.strip() for c in cells[0]][:len(CONTRACT)] == CONTRACT


def test_latex_booktabs_structure_and_escaping(study_maker):
    """The TeX table is booktabs (toprule/midrule/bottomrule), cells escaped, caption names the settings."""
    study, records = study_maker()
    study["model"] = "toy_model & 50% #1"
    rows = agreement_rows(study, records)
    cols = table_columns(study, full=False)
    text = to_latex(rows, cols, caption(study), "tab:x")
    lines = text.splitlines()
    assert lines.index(r"\toprule") < lines.index(r"\midrule") < lines.index(r"\bottomrule")
    spec = re.search(r"\\begin\{tabular\}\{([lr]+)\}", text).group(1)
    assert len(spec) == len(cols)
    body = lines[lines.index(r"\midrule") + 1:lines.index(r"\bottomrule")]
    assert len(body) == len(rows) and all(line.endswith(r"\\") and line.count("&") == len(cols) - 1
                                          for line in body)
    assert r"threshold\_low\_1d" in text
    assert "_" not in text.replace(r"\_", "")
    assert r"toy\_model \& 50\% \#1" in text
    assert "resolution 8 (1D), 4 (2D)" in text and "rectangle 10 x 10 (2D)" in text
    assert "diffusion ratio 0.01" in text and "0.02 relative" in text


def test_tex_escape_specials():
    """Every LaTeX special character is escaped."""
    assert tex_escape(r"a_b&c%d$e#f{g}h~i^j\k") == (r"a\_b\&c\%d\$e\#f\{g\}h\textasciitilde{}i"
                                                     r"\textasciicircum{}j\textbackslash{}k")


def test_parse_formats():
    """`--format` takes any subset of md,csv,tex; anything else is bad input."""
    assert parse_formats(None) == ("md", "csv", "tex")
    assert parse_formats("tex, md") == ("tex", "md")
    with pytest.raises(InputError, match="`--format`"):
        parse_formats("md,html")


# files --------------------------------------------------------------------------------------------------


@pytest.mark.slow
def test_write_report_files(study_maker, study_extras, tmp_path):
    """The report writes every table, each figure as non-trivial PNG and PDF, and an index that shows them."""
    study, records = study_maker({(2, 2): ("unsettled", []), (3, 2): ("diverged", [])})
    paths = write_report(study_extras(study), records, tmp_path)
    names = {p.name for p in paths}
    for stem in ("agreement", "summary"):
        assert {f"{stem}.md", f"{stem}.csv", f"{stem}.tex"} <= names
    figures = ("regimes", "thresholds", "runs", "boundaries", "widths", "ratios")
    for stem in figures:
        for ext in ("png", "pdf"):
            assert (tmp_path / f"{stem}.{ext}").stat().st_size > 5000
    page = (tmp_path / "index.html").read_text()
    assert all(f'src="{stem}.png"' in page for stem in figures)
    assert "cases/x.toml" in page and "rdcheck 0.1.0" in page
    assert page.count("<tr>") == 1 + 5 + 1 + 10  # agreement header + points, summary header + rows
    assert "http" not in page


def test_write_report_formats_and_optional_figures(study_maker, tmp_path):
    """`formats` selects the tables; figures without data (boundaries, widths, ratios) are left out."""
    study, records = study_maker()
    paths = write_report(study, records, tmp_path, ("csv",))
    names = {p.name for p in paths}
    assert {"agreement.csv", "summary.csv"} <= names
    assert not any(n.endswith((".md", ".tex")) for n in names)
    assert not any(n.startswith(("boundaries", "widths", "ratios")) for n in names)
    assert "regimes.png" in names and "index.html" in names


def test_representative_runs_one_per_outcome_then_other_dims(study_maker):
    """Representatives cover every distinct outcome once before repeating one in another dimension."""
    study, records = study_maker()
    runs = representative_runs(study, records)
    outcomes = [r.outcome for r in runs]
    assert outcomes[:4] == ["baseline", "other-uniform", "stationary-pattern", "dynamic-pattern"]
    assert all(r.task.dim == 1 for r in runs[:4])
    assert runs[4].task.dim == 2 and runs[4].outcome in ("stationary-pattern", "dynamic-pattern")


def test_colour_limits_hide_round_off():
    """A field uniform to round-off gets a colour range of at least 1e-6 relative, centred on it."""
    from harness.report import _colour_limits

    lo, hi = _colour_limits(np.array([0.052, 0.052 + 1e-15]))
    assert hi - lo >= 0.052e-6 and lo < 0.052 < hi
    assert _colour_limits(np.array([1.0, 3.0])) == (1.0, 3.0)


def test_index_marks_only_verdicts_and_escapes(study_maker, tmp_path):
    """index.html colours only the agree cells and escapes text from the study."""
    from harness.report import write_index

    study, records = study_maker()
    study["case"] = "cases/<x>&y.toml"
    page = write_index(study, agreement_rows(study, records), [tmp_path / "regimes.png"], tmp_path,
                       date="2026-01-01").read_text()
    assert "cases/&lt;x&gt;&amp;y.toml" in page and "<x>" not in page
    assert page.count('class="true"') == 8  # agree_1d and agree_2d true at four points
    assert page.count('class="false"') == 0 and '<img src="regimes.png"' in page
