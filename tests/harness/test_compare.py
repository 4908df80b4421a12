"""Tests of the regression compare: what counts as moved between two validations, and the store entry points."""

from __future__ import annotations

import copy

import pytest

from harness.compare import brackets_moved, compare_stores, compare_studies
from harness.report import report_store
from harness.store import Store


def _kinds(changes):
    return [(c.value, c.kind, c.dim, c.what) for c in changes]


def test_identical_studies_no_changes(study_maker):
    """A study compared with itself (and with a deep copy) has no changes."""
    base = study_maker()
    assert compare_studies(base, base) == []
    assert compare_studies(base, copy.deepcopy(base)) == []


def test_moved_regime_listed(study_maker):
    """A changed predicted regime is listed at its point."""
    base = study_maker()
    study, records = copy.deepcopy(base)
    study["prediction"]["points"][0]["regime"] = "pulse-triggered"
    changes = compare_studies(base, (study, records))
    assert _kinds(changes) == [(0.5, "regime", None, "regime")]
    assert (changes[0].before, changes[0].after) == ("no-pattern", "pulse-triggered")


def test_moved_noise_and_pulse_outcomes_listed(study_maker):
    """A changed noise outcome (2D) and a changed outcome of a pulse of the same height (1D) are listed."""
    base = study_maker()
    current = study_maker({(2, 2): ("baseline", []),
                          (0, 1): ("baseline", [(1.0, "baseline"), (2.0, "other-uniform")])})
    changes = compare_studies(base, current)
    assert _kinds(changes) == [(0.5, "outcome", 1, "pulse 2"), (1.0, "outcome", 2, "noise")]
    assert "1D pulse 2: baseline -> other-uniform" in str(changes[0])


def test_pulses_of_other_heights_are_not_compared(study_maker):
    """A pulse height tried in only one study is not a change by itself."""
    base = study_maker()
    current = study_maker({(4, 1): ("other-uniform", [(1.0, "baseline"), (1.7, "baseline")])})
    assert compare_studies(base, current) == []


def _with_bracket(study, index, dim, low, high):
    s = copy.deepcopy(study)
    s["points"][index]["threshold"][str(dim)].update(low=low, high=high)
    return s


def test_bracket_moved_beyond_tolerance_listed(study_maker):
    """A bracket that no longer overlaps after widening by the tolerance is listed."""
    base = study_maker()
    current = (_with_bracket(base[0], 1, 1, 1.2, 1.3), base[1])
    changes = compare_studies(base, current)
    assert _kinds(changes) == [(0.75, "threshold", 1, "threshold bracket")]
    assert changes[0].before == "[0.5, 1]" and changes[0].after == "[1.2, 1.3]"


def test_bracket_moved_within_tolerance_not_listed(study_maker):
    """A bracket shifted just past the old one but within the 2% tolerance is not listed; 5% is."""
    base = study_maker()
    assert compare_studies(base, (_with_bracket(base[0], 1, 1, 1.015, 1.1), base[1])) == []
    assert len(compare_studies(base, (_with_bracket(base[0], 1, 1, 1.05, 1.1), base[1]))) == 1
    assert compare_studies(base, (_with_bracket(base[0], 1, 1, 1.05, 1.1), base[1]), tolerance=0.1) == []


def test_brackets_moved_rules():
    """Open ends overlap everything beyond them; a bracket that appears or disappears has moved."""
    assert not brackets_moved((1.0, 2.0), (1.5, None), 0.0)
    assert brackets_moved((1.0, 2.0), (2.5, None), 0.02)
    assert not brackets_moved((None, 1.0), (0.1, 0.2), 0.0)
    assert brackets_moved((1.0, 2.0), (None, None), 0.02)
    assert not brackets_moved((None, None), (None, None), 0.02)
    assert not brackets_moved((-2.0, -1.0), (-0.99, -0.5), 0.02)


def test_points_in_only_one_study_listed(study_maker):
    """Points present in only the base or only the current study are listed as such."""
    base = study_maker()
    study, records = copy.deepcopy(base)
    dropped = study["points"].pop(3)
    extra = copy.deepcopy(study["points"][0])
    extra.update(index=9, value=2.0, params={"k": 2.0})
    study["points"].append(extra)
    changes = compare_studies(base, (study, records))
    assert _kinds(changes) == [(dropped["value"], "only-base", None, "point"), (2.0, "only-current", None, "point")]


def test_values_matched_to_relative_precision(study_maker):
    """Sweep values equal to 1e-12 relative are the same point."""
    base = study_maker()
    study, records = copy.deepcopy(base)
    for p in study["points"]:
        p["value"] *= 1 + 1e-14
    assert compare_studies(base, (study, records)) == []


def _store(path, study, records):
    store = Store(path)
    for rec in records.values():
        store.put(rec)
    store.put_doc("study", study)
    store.consolidate()
    store.close()
    return path


@pytest.mark.slow
def test_stores_end_to_end(study_maker, tmp_path):
    """compare_stores exits 0 on equal stores and 1 with a listing when a run moved; report_store writes files."""
    base = _store(tmp_path / "a.h5", *study_maker())
    same = _store(tmp_path / "b.h5", *study_maker())
    moved = _store(tmp_path / "c.h5", *study_maker({(2, 1): ("baseline", [])}))
    text, code = compare_stores(base, same)
    assert code == 0 and "no changes" in text
    text, code = compare_stores(base, moved)
    assert code == 1 and "1D noise: stationary-pattern -> baseline" in text
    paths = report_store(base, tmp_path / "out", "md")
    assert {"agreement.md", "index.html", "regimes.png"} <= {p.name for p in paths}
    assert "| 1 | self-patterning |" in (tmp_path / "out" / "agreement.md").read_text()


@pytest.mark.slow
def test_report_store_merges_shards(study_maker, record_maker, tmp_path):
    """Two shards with different points are merged in memory into one report."""
    study, records = study_maker()
    shard_a, shard_b = copy.deepcopy(study), copy.deepcopy(study)
    shard_a["points"], shard_b["points"] = study["points"][:2], study["points"][2:]
    a = _store(tmp_path / "a.h5", shard_a, records)
    b = _store(tmp_path / "b.h5", shard_b, {"x": record_maker("x", "baseline", 1.0, "noise", 1e-3, 1)})
    report_store([a, b], tmp_path / "out", "csv")
    lines = (tmp_path / "out" / "agreement.csv").read_text().splitlines()
    assert len(lines) == 1 + 5
