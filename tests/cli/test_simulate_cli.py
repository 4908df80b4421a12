"""`rdcheck simulate` end to end: JSON keys, the HDF5 layout of `--save`, plots, and bad input."""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np
import pytest

from harness.cli import main

CASES = Path(__file__).resolve().parents[2] / "cases"
DEMO = str(CASES / "demo_1d_membrane_switch.toml")
WAVE = str(CASES / "ref_1d_wave_pinning.toml")


def _json(capsys, *argv: str) -> dict:
    assert main(list(argv)) == 0
    return json.loads(capsys.readouterr().out)


def test_simulate_json_and_save_layout(capsys, tmp_path):
    """`--json` carries `outcome`, `t_final`, `mass_drift`; `--save` writes coords, times, state and attributes."""
    path = tmp_path / "run.h5"
    out = _json(capsys, "simulate", DEMO, "--set", "s=0.35", "--start", "noise:1e-3", "--json", "--save", str(path))
    assert {"outcome", "t_final", "mass_drift"} <= set(out)
    assert out["outcome"] == "stationary-pattern"
    assert out["mass_drift"] is None  # the demo has synthesis and turnover: nothing is conserved
    with h5py.File(path) as f:
        coords, times, state = f["coords"][...], f["times"][...], f["state"][...]
        assert coords.shape == (200, 1)
        assert state.shape == (times.size, 2, 200)
        assert [s.decode() if isinstance(s, bytes) else s for s in f.attrs["species"]] == ["a", "c"]
        assert f.attrs["outcome"] == "stationary-pattern"
        assert json.loads(f.attrs["params"])["s"] == 0.35
        probe, nodes = f["history/probe"][...], f["history/probe_nodes"][...]
        assert probe.shape == (f["history/t"].size, 2, 3)
        np.testing.assert_array_equal(probe[-1], f["final"][...][:, nodes])
    assert not (tmp_path / "run.h5.partial").exists()


def test_mass_conserved_run_keeps_its_total(capsys):
    """A compensated pulse on the wave-pinning model keeps a + b to round-off (conservative scheme)."""
    out = _json(capsys, "simulate", WAVE, "--set", "k0=0.067", "--start", "pulse:1.0", "--json")
    assert out["mass_drift"] is not None and out["mass_drift"] < 1e-10
    assert out["outcome"] in {"stationary-pattern", "baseline"}


def test_simulate_plots(capsys, tmp_path):
    """`--plot` writes a space-time picture in 1D and a final-state picture in 2D."""
    for dim in ("1", "2"):
        path = tmp_path / f"run{dim}.png"
        assert main(["simulate", DEMO, "--set", "s=0.2", "--set", "solver.cells_2d=16", "--start", "pulse:0.3",
                     "--dim", dim, "--plot", str(path)]) == 0
        assert path.stat().st_size > 5_000
    assert "baseline" in capsys.readouterr().out


@pytest.mark.parametrize(("argv", "match"), [
    (["simulate", DEMO, "--start", "noise:1e-3"], "give `--set s=VALUE`"),
    (["simulate", DEMO, "--set", "s=0.3", "--start", "wave:1"], "`--start`: expected pulse:HEIGHT"),
    (["simulate", DEMO, "--set", "s=0.3", "--start", "noise:-1"], "`--start`: expected pulse:HEIGHT"),
    (["simulate", DEMO, "--set", "s=0.3", "--start", "pulse:-5"], "`--start pulse:-5`"),
])
def test_simulate_bad_input(capsys, argv, match):
    """Bad starts and a sweep left unset exit 2 with one line."""
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert match in err and err.count("\n") == 1


def test_noise_start_statistics_do_not_depend_on_resolution(capsys, tmp_path):
    """The same seed and amplitude give noise of the same RMS at two resolutions (by construction)."""
    rms = []
    for cells in (100, 400):
        path = tmp_path / f"n{cells}.h5"
        assert main(["simulate", DEMO, "--set", "s=0.1", "--set", f"solver.cells_1d={cells}", "--start",
                     "noise:1e-3", "--save", str(path)]) == 0
        with h5py.File(path) as f:
            a0 = f["state"][0, 0]
        rms.append(float(np.sqrt(np.mean((a0 - a0.mean()) ** 2))))
    capsys.readouterr()
    assert rms[0] == pytest.approx(1e-3, rel=0.05) and rms[1] == pytest.approx(1e-3, rel=0.05)


def test_threshold_command_brackets_and_names_lpa(capsys):
    """`rdcheck threshold --json`: an honest bracket (low did not pattern, high did) and the LPA value."""
    out = _json(capsys, "threshold", DEMO, "--set", "s=0.24", "--set", "solver.cells_1d=100", "--json")
    assert {"low", "high", "lpa"} <= set(out)
    assert out["status"] == "bracketed"
    assert out["low"] < out["high"] <= out["low"] * 1.03
    outcomes = {r["height"]: r["outcome"] for r in out["runs"]}
    assert outcomes[out["low"]] == "baseline" and outcomes[out["high"]] == "stationary-pattern"
    assert out["lpa"] == pytest.approx(0.2362, rel=1e-3)  # the root-scan value of test_predict_cli
