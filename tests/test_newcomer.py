"""Issue 18: the newcomer's path and the error paths.

Exit codes (0 plan, 1 none, 2 bad input), degraded plans flagged, reasons
for infeasibility, vehicles without [envelope], plausibility bounds, the
Python API and the CSV / MATLAB exports.
"""

import json
import math

import numpy as np
import pytest

from codegen.cli import main
from codegen.model import diagnose
from conftest import DEMO_STATE, DEMO_VEHICLE

STATE = "1500,0,1500,-50,0,-40,1900"


def edited(tmp_path, name, **changes):
    """The demo vehicle file with some top-level keys set (None: removed, and
    the [envelope] table dropped with key 'envelope')."""
    lines, skip = [], False
    for line in DEMO_VEHICLE.read_text().splitlines():
        key = line.split("=")[0].strip()
        if line.startswith("["):
            skip = line.strip() == "[envelope]" and changes.get("envelope", 1) is None
        if skip:
            continue
        if key in changes and "=" in line:
            if changes[key] is None:
                continue
            line = f"{key} = {changes[key]!r}"
        lines.append(line)
    path = tmp_path / f"{name}.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


# -- reasons for infeasibility ---------------------------------------------

def test_double_integrator_time_is_the_bang_bang_time():
    # Rest-to-rest over 1 m at 1 m/s^2: 1 s each way (common practice: the
    # bang-bang solution of the minimum-time double integrator).
    assert diagnose._double_integrator_time(1.0, 0.0, 1.0) == pytest.approx(2.0)
    # Moving away at 1 m/s: stop (1 s, at 0.5 m), then come back 0.5 m (2 sqrt(0.5) s).
    assert diagnose._double_integrator_time(0.0, 1.0, 1.0) == pytest.approx(1.0 + math.sqrt(2.0))
    # Checked by simulation: the time found brings a random state to rest.
    rng = np.random.default_rng(3)
    for _ in range(20):
        p, q, a = rng.normal(0, 10), rng.normal(0, 5), rng.uniform(0.5, 3)
        t = diagnose._double_integrator_time(p, q, a)
        u = -a if p + q * abs(q) / (2 * a) > 0 else a     # the first arc's sign
        t1 = t / 2 - q / (2 * u)            # the switch that ends at zero velocity
        assert 0 <= t1 <= t
        x, v = p + q * t1 + 0.5 * u * t1 * t1, q + u * t1
        t2 = t - t1
        x, v = x + v * t2 - 0.5 * u * t2 * t2, v - u * t2
        assert abs(x) < 1e-6 * max(1, abs(p)) and abs(v) < 1e-6 * max(1, abs(q))


@pytest.mark.parametrize("changes,state,extra,words", [
    ({"thrust_max_n": 16.5}, STATE, [], ["cannot hold even the dry mass", "kN"]),
    ({"pointing_max_deg": 0.785}, STATE, ["--no-fallback"], ["pointing_max_deg = 0.785",
                                                              "degrees, not radians"]),
    ({}, "1500,0,-10,-50,0,-40,1900", [], ["below the target"]),
    ({}, "1500,0,100,-50,0,-40,1900", [], ["outside the glide-slope cone"]),
    ({}, "1500,0,1500,-50,0,-40,1460", ["--no-fallback"], ["not enough propellant",
                                                            "rocket equation"]),
])
def test_unreachable_says_why(tmp_path, capsys, changes, state, extra, words):
    path = edited(tmp_path, "v", **changes)
    code = main(["solve", str(path), "--state", state, "--horizon", "10", "--json"] + extra)
    out = capsys.readouterr()
    d = json.loads(out.out)
    assert code == 1 and d["status"] == "unreachable"
    for w in words:
        assert w in d["message"], d["message"]
        assert w in out.err          # on the console too


def test_a_reason_is_a_proof(demo_vehicle):
    # No reason is given for states the reference plans (the envelope's corners).
    env = demo_vehicle.envelope
    for x in (env.position_min_m, env.position_max_m):
        for v in (env.velocity_min_mps, env.velocity_max_mps):
            assert diagnose.reasons(demo_vehicle, x, v, env.mass_min_kg) == []
    # Without a reason, the message says where the search looked.
    msg = diagnose.explain_unreachable(demo_vehicle, *DEMO_STATE)
    lo, hi = diagnose.search_bracket(demo_vehicle, *DEMO_STATE)
    assert msg == f"no feasible time of flight in [{lo:.4g}, {hi:.4g}] s"
    assert diagnose.explain_unreachable(demo_vehicle, *DEMO_STATE, time_of_flight_s=30.0) == \
        "no feasible plan at the time of flight 30 s"


# -- exit codes and degraded plans ------------------------------------------

def test_degraded_plan_warns_and_is_flagged(capsys):
    assert main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "6",
                 "--json"]) == 0
    out = capsys.readouterr()
    d = json.loads(out.out)
    assert d["status"] == "best_reachable" and d["degraded"] is True
    assert "pdgc: warning: target out of reach" in out.err
    assert main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "40",
                 "--json"]) == 0
    out = capsys.readouterr()
    d = json.loads(out.out)
    assert d["status"] == "target_met" and d["degraded"] is False and "warning" not in out.err


@pytest.mark.parametrize("argv,words", [
    (["--state", "nan,0,1500,-50,0,-40,1900"], ["position_m[0] = nan: must be finite"]),
    (["--state", STATE, "--tof", "-3"], ["time_of_flight_s = -3.0"]),
    (["--state", STATE, "--tof", "inf"], ["--tof", "finite"]),
    (["--state", "1500,0,1500,-50,0,-40,2900"], ["mass_kg = 2900.0", "(1450.0, 1900.0]"]),
    (["--state", STATE, "--out", "plan.xlsx"], ["--out", ".json, .csv, .mat"]),
])
def test_bad_input_exit_2_and_a_plain_message(capsys, argv, words):
    with pytest.raises(SystemExit) if "inf" in argv else _nothing() as raised:
        code = main(["solve", str(DEMO_VEHICLE), "--horizon", "10"] + argv)
    code = raised.value.code if raised is not None and hasattr(raised, "value") else code
    err = capsys.readouterr().err
    assert code == 2
    for w in words:
        assert w in err
    assert "np.float64" not in err and "Traceback" not in err and "refused by the solver" not in err


class _nothing:
    def __enter__(self):
        return None

    def __exit__(self, *exc):
        return False


def test_unwritable_output_is_exit_2_without_traceback(tmp_path, capsys):
    (tmp_path / "file").write_text("x")
    code = main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "40",
                 "--out", str(tmp_path / "file" / "plan.csv")])
    err = capsys.readouterr().err
    assert code == 2 and "cannot read or write" in err and str(tmp_path / "file") in err
    assert "Traceback" not in err


# -- vehicle files -----------------------------------------------------------

def test_solve_needs_no_envelope_but_generate_does(tmp_path, capsys):
    path = edited(tmp_path, "noenv", envelope=None)
    assert "[envelope]" not in path.read_text()
    assert main(["solve", str(path), "--state", STATE, "--horizon", "10", "--tof", "40"]) == 0
    assert "target_met" in capsys.readouterr().out
    assert main(["generate", str(path), "--horizon", "10", "--out", str(tmp_path / "t")]) == 2
    err = capsys.readouterr().err
    assert "envelope: missing" in err and "pdgc solve does not" in err and "None" not in err


@pytest.mark.parametrize("key,value,rule", [
    ("thrust_max_n", 1e308, "plausibility bound"), ("mass_wet_kg", 1e308, "plausibility bound"),
    ("gravity_mps2", 1e308, "plausibility bound"), ("isp_s", 1e-300, "plausibility bound"),
    ("speed_max_mps", 1e-300, "plausibility bound"),
])
def test_absurd_magnitudes_are_refused(tmp_path, capsys, key, value, rule):
    path = edited(tmp_path, "absurd", **{key: value})
    code = main(["solve", str(path), "--state", STATE, "--horizon", "10"])
    err = capsys.readouterr().err
    assert code == 2 and f"{key} = {value!r}" in err and rule in err and "Traceback" not in err


def test_unusual_magnitudes_warn(tmp_path):
    from codegen.model.vehicle import load_vehicle
    v = load_vehicle(edited(tmp_path, "odd", isp_s=3000.0))
    assert any("isp_s = 3000.0 is outside the usual range" in w for w in v.warnings)
    assert load_vehicle(DEMO_VEHICLE).warnings == ()


def test_generate_prints_the_cannot_hover_warning(tmp_path, capsys):
    path = edited(tmp_path, "weak", thrust_max_n=6000.0)
    # An unknown backend stops it after the vehicle is read: the warning is
    # printed before any generation work, as by pdgc solve.
    code = main(["generate", str(path), "--horizon", "10", "--backend", "nope",
                 "--out", str(tmp_path / "t")])
    err = capsys.readouterr().err
    assert code == 2 and "cannot hover the dry mass" in err


def test_generate_help_explains_every_argument(capsys):
    with pytest.raises(SystemExit):
        main(["generate", "--help"])
    out = capsys.readouterr().out
    for words in ("vehicle file", "number of intervals", "floating-point type"):
        assert words in out


# -- exports and the Python API ----------------------------------------------

def test_csv_and_mat_exports_hold_the_plan(tmp_path):
    from scipy.io import loadmat
    import codegen.api as pdgc

    traj = pdgc.plan(pdgc.load_vehicle(DEMO_VEHICLE), *DEMO_STATE, time_of_flight_s=40.0,
                     horizon=10)
    assert traj.status == "target_met"
    traj.save(tmp_path / "p.csv")
    text = (tmp_path / "p.csv").read_text()
    assert "# status: target_met" in text
    body = [ln for ln in text.splitlines() if not ln.startswith("#")]
    rows = np.genfromtxt(body, delimiter=",", names=True)
    assert len(rows) == 11
    assert np.allclose(rows["up_m"], traj.position_m[:, 2], rtol=0, atol=0)
    assert np.allclose(rows["thrust_up_n"][:-1], traj.thrust_n[:, 2], rtol=0, atol=0)
    assert math.isnan(rows["throttle"][-1])      # the last node starts no interval
    pdgc.save(traj, tmp_path / "p.mat")
    m = loadmat(tmp_path / "p.mat")
    assert m["position_m"].shape == (11, 3) and np.array_equal(m["position_m"], traj.position_m)
    assert str(m["status"][0]) == "target_met" and float(m["fuel_kg"][0, 0]) == traj.fuel_kg
    pdgc.save(traj, tmp_path / "p.json")
    assert json.loads((tmp_path / "p.json").read_text())["fuel_kg"] == traj.fuel_kg
    with pytest.raises(pdgc.InputError, match="must end in"):
        traj.save(tmp_path / "p.txt")
    assert not (tmp_path / "p.txt").exists()


def test_solve_out_writes_the_format_of_its_suffix(tmp_path, capsys):
    from scipy.io import loadmat
    for suffix in ("json", "csv", "mat"):
        out = tmp_path / f"plan.{suffix}"
        assert main(["solve", str(DEMO_VEHICLE), "--state", STATE, "--horizon", "10", "--tof", "40",
                     "--out", str(out)]) == 0
        assert out.exists()
    assert loadmat(tmp_path / "plan.mat")["t_s"].shape == (11, 1)
    assert [p.name for p in tmp_path.iterdir() if ".tmp" in p.name] == []


# -- pictures -----------------------------------------------------------------

def test_demo_plot_shows_throttle_fraction_3d_and_target_relative_axes(demo_vehicle):
    import matplotlib.pyplot as plt
    from codegen.plot import plot_figure
    import codegen.api as pdgc

    traj = pdgc.plan(demo_vehicle, *DEMO_STATE, time_of_flight_s=40.0, target_m=(0, 100, 0),
                     horizon=10)
    fig = plot_figure(traj, demo_vehicle, (0, 100, 0))
    try:
        axes = {a.get_title(): a for a in fig.axes}
        thr = axes["throttle"]
        assert "fraction of thrust_max_n" in thr.get_ylabel()
        (line,) = [ln for ln in thr.get_lines() if ln.get_label() == "throttle"]
        assert np.allclose(line.get_ydata()[:10], traj.throttle)
        bounds = sorted(ln.get_ydata()[0] for ln in thr.get_lines() if ln.get_label() != "throttle")
        assert bounds == [demo_vehicle.throttle_min, traj.throttle_limit]
        three_d = [a for a in fig.axes if a.name == "3d"]
        assert len(three_d) == 1 and "from the target (0, 100, 0) m" in three_d[0].get_title()
        assert "from the target" in axes["side view"].get_xlabel()
    finally:
        plt.close(fig)


def _captured_figures(monkeypatch, records, **kw):
    import codegen.plot
    from codegen.verify.envelope import figures as efig
    got = {}

    def keep(fig, dpi=100):
        fig.canvas.draw()
        got[len(got)] = fig
        return f"fig{len(got) - 1}"

    monkeypatch.setattr(codegen.plot, "figure_png_base64", keep)
    names = efig.figures(records, 30, 300, **kw)
    return {name: got[int(uri[3:])] for name, uri in names.items()}


def _record(i, x, up, it, t):
    gen = {"status": "target_met", "iterations_max": it, "iterations_total": 10 * it,
           "solve_time_s": t, "fuel_kg": 100.0 + i}
    return {"case": i, "inputs": {"position_m": [x, 0.0, up]}, "generated": gen, "accuracy": None}


def test_feasibility_map_draws_the_envelope_box(monkeypatch, demo_vehicle):
    from matplotlib.patches import Rectangle
    recs = [_record(i, 1200.0 + 100 * i, 1300.0 + 50 * i, 12 + i % 3, 0.01) for i in range(5)]
    figs = _captured_figures(monkeypatch, recs, envelope=demo_vehicle.envelope)
    (box,) = [p for p in figs["feasibility"].axes[0].patches if isinstance(p, Rectangle)]
    env = demo_vehicle.envelope
    assert box.get_xy() == (env.position_min_m[0], env.position_min_m[2])
    assert box.get_width() == env.position_max_m[0] - env.position_min_m[0]
    assert box.get_height() == env.position_max_m[2] - env.position_min_m[2]
    assert box.get_label() == "vehicle [envelope]"


def test_histograms_of_few_cases_have_readable_integer_ticks(monkeypatch):
    recs = [_record(i, 1500.0, 1500.0, 12 + i % 3, 0.010 + 0.001 * i) for i in range(4)]
    figs = _captured_figures(monkeypatch, recs)
    for name in ("iterations", "solve_time"):
        ax = figs[name].axes[0]
        lo, hi = ax.get_ylim()
        ticks = [t for t in ax.get_yticks() if lo <= t <= hi]
        assert len(ticks) >= 2, (name, ticks)
        assert all(float(t).is_integer() for t in ticks), (name, ticks)   # counts of cases
        labels = [lab.get_text() for lab in ax.get_yticklabels() if lab.get_text()]
        assert labels, name
        xlo, xhi = ax.get_xlim()
        assert len([t for t in ax.get_xticks() if xlo <= t <= xhi]) >= 2, name


def test_api_generated_solver_answers_like_the_reference(tmp_path):
    import codegen.api as pdgc
    vehicle = pdgc.load_vehicle(DEMO_VEHICLE)
    ref = pdgc.plan(vehicle, *DEMO_STATE, horizon=10)
    tree = pdgc.generate(DEMO_VEHICLE, tmp_path / "t10", horizon=10)
    solver = pdgc.load_generated(tree)
    gen = solver.solve(*DEMO_STATE)
    assert isinstance(gen, pdgc.Trajectory) and isinstance(ref, pdgc.Trajectory)
    assert gen.status == ref.status == "target_met"
    # pdgc check's tolerance on a searched plan's fuel (README: 1e-4 relative).
    assert abs(gen.fuel_kg - ref.fuel_kg) <= 1e-4 * ref.fuel_kg
    # The generated solver's no-plan message says why, as the reference's does.
    below = solver.solve([1500.0, 0.0, -10.0], [-50.0, 0.0, -40.0], 1900.0)
    assert below.status == "unreachable" and "below the target" in below.message
    assert not below.degraded


def test_handoff_refuses_a_negative_check_count_before_any_work(capsys):
    with pytest.raises(SystemExit) as info:
        main(["handoff", "generated/demo", "--check-cases", "-3", "--no-checks"])
    err = capsys.readouterr().err
    assert info.value.code == 2 and "--check-cases = -3: must be >= 0" in err
    assert "reference solve" not in err
