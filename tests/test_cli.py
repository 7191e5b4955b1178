"""The command line refuses bad input with one clear line and exit code 2 (no traceback)."""

from __future__ import annotations

import subprocess
import sys

import pytest

from tbminv.layout import demo_layout_path


def _run(*args: str, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tbminv", *args], capture_output=True,
                          text=True, timeout=300, cwd=cwd)


@pytest.mark.parametrize(("option", "value"), [("--noise-rel", "-1"), ("--noise-abs", "-0.1"),
                                               ("--contrast", "0"), ("--contrast", "-3"),
                                               ("--k", "0"), ("--noise-rel", "nan"),
                                               ("--false-alarm", "0"), ("--false-alarm", "1.5"),
                                               ("--detection-probability", "1")])
def test_reach_refuses_impossible_numbers(tmp_path, option, value):
    out = _run("reach", "--layout", str(demo_layout_path()), "--out", str(tmp_path / "o"),
               option, value)
    assert out.returncode == 2
    assert option in out.stderr and "Traceback" not in out.stderr
    assert not (tmp_path / "o").exists()


def test_simulate_axisym_refuses_an_off_axis_body_in_one_line(tmp_path):
    ground = tmp_path / "ground.toml"
    ground.write_text("background_resistivity_ohmm = 100.0\n[[sphere]]\nchainage_m = 1210.0\n"
                      "y_m = 5.0\nz_m = 0.0\nradius_m = 2.0\nresistivity_ohmm = 10.0\n",
                      encoding="utf-8")
    log = tmp_path / "log.csv"
    out = _run("simulate", "--layout", str(demo_layout_path()), "--ground", str(ground),
               "--faces", "1200:1201:1", "--out", str(log))
    assert out.returncode == 2
    assert "Traceback" not in out.stderr
    errors = [line for line in out.stderr.splitlines() if "error:" in line]
    assert len(errors) == 1 and str(ground) in errors[0] and "--model 3d" in errors[0]
    assert not log.exists()


def test_simulate_cutterhead_angles(tmp_path):
    """``--cutterhead-angles 0:90:45`` (STOP included) gives three readings per quadrupole and
    advance, each logging its angle; a step pointing away from STOP is bad input."""
    import pandas as pd

    from tbminv.layout import load_layout

    ground = tmp_path / "ground.toml"
    ground.write_text("background_resistivity_ohmm = 100.0\n", encoding="utf-8")
    log = tmp_path / "log.csv"
    out = _run("simulate", "--layout", str(demo_layout_path()), "--ground", str(ground),
               "--faces", "1200:1201.5:1.5", "--out", str(log), "--cutterhead-angles",
               "0:90:45")
    assert out.returncode == 0, out.stderr
    df = pd.read_csv(log)
    assert sorted(df.cutterhead_deg.unique().tolist()) == [0.0, 45.0, 90.0]
    per = df.groupby(["advance", "cutterhead_deg"]).size()
    assert per.nunique() == 1 and len(per) == 6
    n_meas = len(load_layout(demo_layout_path()).measurements)
    assert per.iloc[0] >= n_meas
    bad = _run("simulate", "--layout", str(demo_layout_path()), "--ground", str(ground),
               "--faces", "1200", "--out", str(tmp_path / "bad.csv"), "--cutterhead-angles",
               "90:0:45")
    assert bad.returncode == 2 and "--cutterhead-angles" in bad.stderr
    assert "Traceback" not in bad.stderr and not (tmp_path / "bad.csv").exists()
