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
    for row in ("status", "target_met", "time of flight", "fuel", "throttle min / max",
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
    assert d["status"] == "target_met" and d["time_of_flight_s"] == 40.0
    assert len(d["t_s"]) == 16 and len(d["thrust_n"]) == 15 and len(d["position_m"][0]) == 3
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("state,field", [("1,2,3", "--state"), ("1500,0,1500,-50,0,-40,abc", "--state[6]"),
                                         ("1500,0,1500,-50,0,-40,100", "mass_kg")])
def test_bad_state_exit_2_names_field(state, field, capsys):
    code = main(["solve", str(DEMO_VEHICLE), "--state", state, "--horizon", "10", "--json"])
    out = capsys.readouterr()
    # A state the vehicle cannot have is bad input too: exit 2, the field named.
    assert code == 2 and field in out.err


def test_out_of_reach_is_a_warned_plan_or_exit_1(capsys):
    # 5 s is too short to stop: the best reachable plan (exit 0, a warning),
    # or with --no-fallback no plan (exit 1).
    code = main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "5"])
    out = capsys.readouterr()
    assert code == 0 and "best_reachable" in out.out and "warning: target out of reach" in out.err
    code = main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "5",
                 "--no-fallback"])
    assert code == 1 and "unreachable" in capsys.readouterr().out


def test_console_script_runs():
    r = subprocess.run([sys.executable, "-m", "codegen.cli", "--version"], capture_output=True,
                       text=True)
    assert r.returncode == 0 and "pdgc" in r.stdout


def test_no_fallback_reports_infeasible_like_generated_code(capsys):
    # Out of reach (14 km downrange, 6 deg above the target: inside the glide slope): best_reachable with the two-stage plan
    # (least terminal error, then least fuel: Blackmore, Acikmese & Scharf
    # 2010, extended to the velocity), infeasible without it.
    far = "14000,0,1500,-50,0,-40,1900"
    assert main(["solve", str(DEMO_VEHICLE), "--state", far, "--horizon", "10", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["status"] == "best_reachable"
    assert main(["solve", str(DEMO_VEHICLE), "--state", far, "--horizon", "10", "--json",
                 "--no-fallback"]) == 1
    assert json.loads(capsys.readouterr().out)["status"] == "unreachable"


def test_a_state_west_of_the_pad_is_one_argument(capsys):
    # "--state -1500,..." used to fail in argparse ("expected one argument"):
    # a value that starts with a minus sign read as an option.
    assert main(["solve", str(DEMO_VEHICLE), "--state", "-1500,0,1500,50,0,-40,1900",
                 "--horizon", "8", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["status"] == "target_met"
    assert out["position_m"][0][0] == pytest.approx(-1500.0, abs=1e-6)   # scaled round trip


def test_check_on_a_vehicle_file_is_bad_input(capsys):
    # pdgc check takes a generated tree; a vehicle file ended in a traceback.
    assert main(["check", str(DEMO_VEHICLE), "--cases", "2"]) == 2
    err = capsys.readouterr().err
    assert "dir = " in err and "manifest.json" in err


BOOSTER_VEHICLE = DEMO_VEHICLE.parent / "demo_booster.toml"
BOOSTER_STATE = "100,0,3000,-10,0,-250,30000"


def test_solve_booster_routes_to_scvx_reference(capsys):
    assert main(["solve", str(BOOSTER_VEHICLE), "--state", BOOSTER_STATE, "--horizon", "12",
                 "--tof", "20", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["solver"] == "reference-scvx" and d["status"] == "target_met"
    assert d["convergence"] == "converged" and 1 < d["passes"] <= 15
    assert max(abs(x) for x in d["predicted_position_error_m"]) < 1e-2


def test_solve_moving_pad_on_the_lander(capsys):
    assert main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "12", "--tof", "45",
                 "--target", "10,0,0", "--target-velocity", "2,0,0", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["status"] == "target_met" and d["passes"] == 1
    assert abs(d["position_m"][-1][0] - (10 + 2 * 45)) < 1e-6
    assert abs(d["velocity_mps"][-1][0] - 2.0) < 1e-7


@pytest.mark.parametrize("extra,field", [(["--solver-dir", "generated/demo"], "--solver-dir"),
                                         (["--target-velocity", "1,2"], "--target-velocity")])
def test_booster_bad_options_exit_2(extra, field, capsys):
    code = main(["solve", str(BOOSTER_VEHICLE), "--state", BOOSTER_STATE, "--horizon", "10",
                 "--tof", "20"] + extra)
    assert code == 2 and field in capsys.readouterr().err


def test_generate_refuses_booster_additions(tmp_path, capsys):
    code = main(["generate", str(BOOSTER_VEHICLE), "--horizon", "10", "--out", str(tmp_path / "t")])
    err = capsys.readouterr().err
    assert code == 2 and "booster additions" in err and not (tmp_path / "t").exists()
