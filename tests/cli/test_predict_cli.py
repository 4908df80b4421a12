"""`rdcheck predict` end to end: JSON contract, table, plot, and bad input (exit 2, one line)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

from harness.cli import main

CASES = Path(__file__).resolve().parents[2] / "cases"
DEMO = CASES / "demo_1d_membrane_switch.toml"


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_predict_json_contract(capsys):
    """`--json` prints one object with `points`, each with the keys DESIGN.md promises."""
    code, out, _ = _run(capsys, "predict", str(CASES / "ref_1d_wave_pinning.toml"), "--json")
    assert code == 0
    data = json.loads(out)
    assert len(data["points"]) == 25
    for point in data["points"]:
        assert {"params", "regime", "threshold", "hss", "turing_unstable"} <= set(point)
        assert point["regime"] in {"no-pattern", "pulse-triggered", "self-patterning", "self-oscillating",
                                   "unresolved"}
        assert isinstance(point["turing_unstable"], bool)
    assert data["conservation"] == [["1", "1"]]


def test_demo_threshold_against_independent_root_scan(capsys):
    """The demo's predicted threshold at s = 0.24 equals (unstable local root - HSS), found here independently.

    At the HSS, total turnover gives s = d c* + mu a*; the local equation at fixed c* is
    c* (k_b + k_f a^2/(K^2 + a^2)) - (k_off + mu) a = 0, whose middle root bounds the HSS's basin.
    """
    code, out, _ = _run(capsys, "predict", str(DEMO), "--set", "s=0.24", "--json")
    assert code == 0
    point = json.loads(out)["points"][0]
    s, d, kb, kf, big_k, koff, mu = 0.24, 0.05, 0.05, 1.0, 1.0, 1.0, 0.5

    def hill(a):
        return kb + kf * a**2 / (big_k**2 + a**2)

    hss_a = brentq(lambda a: (s - mu * a) / d * hill(a) - (koff + mu) * a, 1e-9, 0.3)
    c_star = (s - mu * hss_a) / d
    grid = np.linspace(hss_a + 1e-6, 5.0, 20001)
    local = c_star * hill(grid) - (koff + mu) * grid
    i = int(np.flatnonzero(np.sign(local[:-1]) != np.sign(local[1:]))[0])
    unstable = brentq(lambda a: c_star * hill(a) - (koff + mu) * a, grid[i], grid[i + 1])
    assert point["regime"] == "pulse-triggered"
    assert point["hss"]["a"] == pytest.approx(hss_a, rel=1e-9)
    assert point["threshold"] == pytest.approx(unstable - hss_a, rel=1e-6)


def test_demo_sweep_crosses_three_regimes(capsys):
    """The demo's sweep crosses at least three regimes, `pulse-triggered` among them."""
    code, out, _ = _run(capsys, "predict", str(DEMO), "--json")
    assert code == 0
    regimes = {p["regime"] for p in json.loads(out)["points"]}
    assert "pulse-triggered" in regimes
    assert len(regimes - {"unresolved"}) >= 3


def test_predict_table_and_plot(capsys, tmp_path):
    """Without `--json` a table is printed, one row per point; `--plot` writes the figure."""
    plot = tmp_path / "states.png"
    code, out, _ = _run(capsys, "predict", str(DEMO), "--plot", str(plot))
    assert code == 0
    lines = out.strip().splitlines()
    assert any("regime" in line and "threshold" in line for line in lines)
    assert sum(line.startswith("0.") for line in lines) == 31
    assert plot.stat().st_size > 10_000


@pytest.mark.parametrize(("argv", "match"), [
    (["predict", "nope.toml"], "nope.toml: `(file)`: no such file"),
    (["predict", str(DEMO), "--set", "zz=1"], "`--set zz`: not a parameter"),
    (["predict", str(DEMO), "--set", "domain.shape=torus"], "`domain.shape`: expected one of"),
])
def test_bad_input_exit_two_one_line(capsys, argv, match):
    """Bad input: exit status 2 and one line on stderr naming file and key, nothing on stdout."""
    code, out, err = _run(capsys, *argv)
    assert code == 2
    assert out == ""
    assert err.count("\n") == 1 and match in err


def test_forbidden_expression_exit_two_without_running(tmp_path):
    """A case whose reaction tries to run code exits 2 through the console script and runs nothing."""
    marker = tmp_path / "ran"
    evil = f"__import__('os').mkdir('{marker}') + s - d*c"
    text = DEMO.read_text().replace('reaction = "s - d*c', f'reaction = "{evil}')
    case = tmp_path / "evil.toml"
    case.write_text(text)
    proc = subprocess.run([sys.executable, "-m", "harness.cli", "predict", str(case)], capture_output=True,
                          text=True, check=False)
    assert proc.returncode == 2
    assert "species.c.reaction" in proc.stderr and proc.stderr.count("\n") == 1
    assert "Traceback" not in proc.stderr
    assert not marker.exists()


def test_usage_error_is_one_line(capsys):
    """An unknown option is a usage error: exit 2 and one line."""
    with pytest.raises(SystemExit) as info:
        main(["predict", str(DEMO), "--bogus"])
    assert info.value.code == 2
    assert capsys.readouterr().err.count("\n") == 1
