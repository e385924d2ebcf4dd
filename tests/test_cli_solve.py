"""`pdgc init` and `pdgc solve` as a user runs them."""

import json
import subprocess
import sys

import pytest

from codegen.cli import main
from conftest import DEMO_VEHICLE

STATE = "1500,0,1500,-50,0,-40,1900"


def test_init_writes_demo_and_refuses_overwrite(tmp_path, capsys):
    assert main(["init", str(tmp_path)]) == 0
    text = (tmp_path / "vehicle.toml").read_text()
    assert "INVENTED" in text and "mass_wet_kg" in text
    assert main(["init", str(tmp_path)]) == 2
    assert "exists" in capsys.readouterr().err


def test_solve_table(capsys):
    assert main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "20"]) == 0
    out = capsys.readouterr().out
    for row in ("status", "optimal", "time of flight", "fuel", "throttle min / max",
                "pointing margin", "glide-slope margin", "tightness gap"):
        assert row in out
    gap = float(out.split("tightness gap |u| vs sigma")[1].split()[0])
    assert gap < 1e-6


def test_solve_json_schema_and_plot(tmp_path, capsys):
    png = tmp_path / "plan.png"
    assert main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "15", "--tof", "40",
                 "--json", "--plot", str(png)]) == 0
    d = json.loads(capsys.readouterr().out)
    for key in ("status", "time_of_flight_s", "fuel_kg", "landing_miss_m", "iterations",
                "t_s", "position_m", "velocity_mps", "mass_kg", "thrust_n"):
        assert key in d
    assert d["status"] == "optimal" and d["time_of_flight_s"] == 40.0
    assert len(d["t_s"]) == 16 and len(d["thrust_n"]) == 15 and len(d["position_m"][0]) == 3
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("state,field", [("1,2,3", "--state"), ("1500,0,1500,-50,0,-40,abc", "--state[6]"),
                                         ("1500,0,1500,-50,0,-40,100", "mass_kg")])
def test_bad_state_exit_2_names_field(state, field, capsys):
    code = main(["solve", str(DEMO_VEHICLE), "--state", state, "--horizon", "10", "--json"])
    out = capsys.readouterr()
    if field == "mass_kg":
        # A state the vehicle cannot have is a solve status, not a crash.
        assert code == 1 and json.loads(out.out)["status"] == "bad_input"
    else:
        assert code == 2 and field in out.err


def test_infeasible_exit_1(capsys):
    code = main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "5"])
    assert code == 1 and "infeasible" in capsys.readouterr().out


def test_console_script_runs():
    r = subprocess.run([sys.executable, "-m", "codegen.cli", "--version"], capture_output=True,
                       text=True)
    assert r.returncode == 0 and "pdgc" in r.stdout


def test_no_fallback_reports_infeasible_like_generated_code(capsys):
    # Out of reach (20 km downrange): least_miss with the two-stage fallback
    # (Blackmore et al. 2010), infeasible without it.
    far = "20000,0,1500,-50,0,-40,1900"
    assert main(["solve", str(DEMO_VEHICLE), "--state", far, "--horizon", "10", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["status"] == "least_miss"
    assert main(["solve", str(DEMO_VEHICLE), "--state", far, "--horizon", "10", "--json",
                 "--no-fallback"]) == 1
    assert json.loads(capsys.readouterr().out)["status"] == "infeasible"
