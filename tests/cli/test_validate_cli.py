"""`rdcheck validate` / `report` / `compare` / `merge` end to end on a small demo study."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from harness.cli import main

CASES = Path(__file__).resolve().parents[2] / "cases"
DEMO = str(CASES / "demo_1d_membrane_switch.toml")
SMALL = ["--set", "sweep.values=[0.16, 0.24, 0.4, 0.66]", "--set", "solver.cells_1d=100"]


def _validate(store: Path, *extra: str) -> None:
    assert main(["validate", DEMO, *SMALL, "--dims", "1", "--store", str(store), *extra]) == 0


def _table(store: Path | list[Path], out: Path) -> list[dict]:
    stores = [str(s) for s in store] if isinstance(store, list) else [str(store)]
    assert main(["report", *stores, "--out", str(out)]) == 0
    with open(out / "agreement.csv", newline="") as f:
        return list(csv.DictReader(f))


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """One validation of four demo points in a local process pool, and its report."""
    root = tmp_path_factory.mktemp("study")
    store = root / "demo.h5"
    _validate(store, "--workers", "2")
    return store, _table(store, root / "report"), root / "report"


def test_report_tables_and_figures(study, capsys):
    """The report has one row per point with the DESIGN.md columns, and every table and figure file."""
    _, rows, out = study
    assert [float(r["s"]) for r in rows] == [0.16, 0.24, 0.4, 0.66]
    for col in ("s", "regime", "turing_unstable", "threshold_lpa", "noise_1d", "pulse_1d", "threshold_low_1d",
                "threshold_high_1d", "agree_1d"):
        assert col in rows[0]
    for name in ("agreement.csv", "agreement.md", "agreement.tex", "index.html", "regimes.png", "regimes.pdf",
                 "diagram.png", "diagram_plane.png"):
        assert (out / name).stat().st_size > 100
    by_s = {float(r["s"]): r for r in rows}
    assert by_s[0.16]["regime"] == "no-pattern" and by_s[0.16]["agree_1d"] == "true"
    assert by_s[0.4]["regime"] == "self-patterning" and by_s[0.4]["noise_1d"] == "stationary-pattern"
    low, high = float(by_s[0.24]["threshold_low_1d"]), float(by_s[0.24]["threshold_high_1d"])
    assert low < high <= 1.03 * low  # an honest bracket within the 2 % tolerance (plus rounding)
    assert "\\toprule" in (out / "agreement.tex").read_text()
    capsys.readouterr()


def test_rerun_recomputes_nothing(study, monkeypatch, capsys):
    """Rerunning the same command finds every run in the store and computes none."""
    store, rows, _ = study
    import harness.runs

    def refuse(*args, **kwargs):
        msg = "a stored run was recomputed"
        raise AssertionError(msg)

    monkeypatch.setattr(harness.runs, "run_task", refuse)
    _validate(store, "--workers", "0")
    capsys.readouterr()


def test_compare_exit_codes(study, tmp_path, capsys):
    """`compare` exits 0 for the same study and 1 when a model change moves outcomes or thresholds."""
    store, _, _ = study
    assert main(["compare", str(store), str(store)]) == 0
    changed = tmp_path / "changed.h5"
    _validate(changed, "--workers", "0", "--set", "k_f=1.3")
    capsys.readouterr()
    assert main(["compare", str(store), str(changed)]) == 1
    listing = capsys.readouterr().out
    assert "regime: " in listing or "noise: " in listing or "threshold bracket" in listing


def test_shards_merge_to_the_same_table(study, tmp_path, capsys):
    """Two shards, merged by `rdcheck merge` or given to `report` together, give the same table."""
    _, rows, _ = study
    shards = [tmp_path / f"part{k}.h5" for k in (1, 2)]
    for k, path in enumerate(shards, start=1):
        _validate(path, "--workers", "0", "--shard", f"{k}/2")
    together = _table(shards, tmp_path / "together")
    merged = tmp_path / "merged.h5"
    assert main(["merge", *map(str, shards), "--out", str(merged)]) == 0
    assert _table(merged, tmp_path / "merged_report") == together
    keys = ("s", "regime", "noise_1d", "pulse_1d", "agree_1d")
    assert [{k: r[k] for k in keys} for r in together] == [{k: r[k] for k in keys} for r in rows]
    capsys.readouterr()


def test_bad_options_exit_two(capsys):
    """Bad `--shard`, `--dims` and `--tolerance` values exit 2 with one line."""
    for extra in (["--shard", "3/2"], ["--dims", "3"], ["--tolerance", "2"]):
        assert main(["validate", DEMO, *extra]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and extra[0] in err


def test_quick_demo_end_to_end(tmp_path, capsys):
    """`validate --quick` on the demo, then `report`: every point gets a row and a 1D verdict column."""
    store = tmp_path / "quick.h5"
    assert main(["validate", DEMO, "--quick", "--workers", "2", "--store", str(store),
                 "--set", "sweep.values={ start = 0.1, stop = 0.7, num = 7 }"]) == 0
    rows = _table(store, tmp_path / "report")
    assert len(rows) == 7
    assert {r["regime"] for r in rows} >= {"no-pattern", "pulse-triggered", "self-patterning"}
    assert "noise_2d" not in rows[0]  # --quick runs 1D only
    capsys.readouterr()


def test_diverging_runs_are_recorded_and_the_sweep_finishes(tmp_path, capsys):
    """A case whose pulse blows up is recorded as `diverged` at that point while the other points finish."""
    text = Path(DEMO).read_text().replace(
        'reaction = "c*(k_b + k_f*a**2/(K**2 + a**2)) - k_off*a - mu*a"',
        'reaction = "c*(k_b + k_f*a**2/(K**2 + a**2)) - k_off*a - mu*a + 100*max(s - 0.5, 0)*max(a - 1.2, 0)**2"')
    case = tmp_path / "blowup.toml"
    case.write_text(text)
    store = tmp_path / "blowup.h5"
    assert main(["validate", str(case), "--dims", "1", "--workers", "0", "--store", str(store), "--set",
                 "sweep.values=[0.2, 0.4, 0.6]", "--set", "solver.cells_1d=60"]) == 0
    rows = {float(r["s"]): r for r in _table(store, tmp_path / "report")}
    assert set(rows) == {0.2, 0.4, 0.6}
    assert rows[0.6]["pulse_1d"] == "diverged"
    assert rows[0.2]["noise_1d"] == "baseline"
    capsys.readouterr()


@pytest.mark.slow
def test_dask_cluster_gives_the_same_table(study, tmp_path, capsys):
    """A real Dask LocalCluster gives the same agreement table as the local process pool."""
    distributed = pytest.importorskip("distributed")
    _, rows, _ = study
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        store = tmp_path / "dask.h5"
        _validate(store, "--scheduler", c.scheduler_address)
    assert _table(store, tmp_path / "dask_report") == rows
    capsys.readouterr()


def test_boundaries_widths_ratios_and_wall_limit(tmp_path, capsys):
    """Boundary brackets lie between the neighbours whose behaviour differs; `--widths` and `--ratios` give
    their entries and figures; a zero wall-time limit makes every run `unsettled` (never a guessed verdict)."""
    from harness.store import Store

    store = tmp_path / "extras.h5"
    assert main(["validate", DEMO, "--dims", "1", "--workers", "0", "--store", str(store),
                 "--set", "sweep.values=[0.16, 0.24]", "--set", "solver.cells_1d=100",
                 "--widths", "0.1,1.0", "--ratios", "0.1"]) == 0
    study = Store(store).get_doc("study")
    (boundary,) = study["boundaries"]
    assert 0.16 <= boundary["low"] < boundary["high"] <= 0.24
    assert boundary["high"] - boundary["low"] <= 0.125 * 0.08 + 1e-12
    # the fold located by our continuation (regression value of this project, between no-pattern at 0.16
    # and pulse-triggered at 0.24 in the point-wise analysis)
    assert boundary["spike_limit"] == pytest.approx(0.19238, abs=1e-4)
    widths = {w["width"]: w for w in study["widths"]}
    assert set(widths) == {0.1, 1.0} and all(w["status"] == "bracketed" for w in widths.values())
    assert widths[1.0]["high"] < widths[0.1]["low"]  # a wider pulse needs less height
    (ratio,) = study["ratios"]
    assert ratio["ratio"] == 0.1 and ratio["points"] == 2
    out = tmp_path / "report"
    assert main(["report", str(store), "--out", str(out)]) == 0
    assert (out / "widths.png").exists() and (out / "ratios.png").exists() and (out / "boundaries.png").exists()
    limited = tmp_path / "limited.h5"
    assert main(["validate", DEMO, "--dims", "1", "--workers", "0", "--store", str(limited), "--wall-limit", "0",
                 "--set", "sweep.values=[0.4]", "--set", "solver.cells_1d=60"]) == 0
    outcomes = {r.outcome for r in Store(limited).records()}
    assert outcomes == {"unsettled"}
    capsys.readouterr()
