"""The dispersion file: validation, and draws that follow their distributions."""

import math

import numpy as np
import pytest
from scipy import stats as sps

from codegen.verify.dispersions import COMPONENTS, load_dispersions, parse_dispersions
from codegen.errors import InputError
from conftest import ROOT

DEMO_DISPERSIONS = ROOT / "examples" / "demo_dispersions.toml"


def base_doc():
    return {
        "seed": 5,
        "position_m": {
            "x": {"distribution": "uniform", "low": 1000.0, "high": 2000.0},
            "y": {"distribution": "normal", "mean": 0.0, "std": 100.0},
            "up": {"distribution": "truncated_normal", "mean": 1500.0, "std": 200.0,
                   "low": 1200.0, "high": 1800.0},
        },
        "velocity_mps": {
            "x": {"distribution": "normal", "mean": -50.0, "std": 10.0},
            "y": {"distribution": "fixed", "value": 0.0},
            "up": {"distribution": "uniform", "low": -60.0, "high": -20.0},
        },
        "mass_kg": {"distribution": "uniform", "low": 1850.0, "high": 1900.0},
    }


def test_demo_file_loads_and_says_it_is_invented(demo_vehicle):
    d = load_dispersions(DEMO_DISPERSIONS, demo_vehicle)
    assert d.time_of_flight_s is None and d.thrust_derate is None
    assert "INVENTED" in DEMO_DISPERSIONS.read_text()
    c = d.case(0)
    assert demo_vehicle.mass_dry_kg < c.mass_kg <= demo_vehicle.mass_wet_kg


def test_envelope_box_file_is_the_vehicles_envelope(demo_vehicle):
    # examples/demo_envelope_box.toml samples exactly the demo vehicle's
    # [envelope] box (uniform per coordinate): issue 17's iteration figures
    # are quoted over it, so it must follow the vehicle file.
    path = ROOT / "examples" / "demo_envelope_box.toml"
    assert "INVENTED" in path.read_text()
    d = load_dispersions(path, demo_vehicle)
    assert d.time_of_flight_s is None
    env = demo_vehicle.envelope
    cases = [d.case(i) for i in range(2000)]
    for name, lo, hi in (("position_m", env.position_min_m, env.position_max_m),
                         ("velocity_mps", env.velocity_min_mps, env.velocity_max_mps)):
        vals = np.array([getattr(c, name) for c in cases])
        assert (vals >= np.asarray(lo)).all() and (vals <= np.asarray(hi)).all()
        span = np.asarray(hi) - np.asarray(lo)
        # uniform over the whole box: the draws reach within 1 % of each face
        assert (vals.min(axis=0) - np.asarray(lo) < 0.01 * span).all()
        assert (np.asarray(hi) - vals.max(axis=0) < 0.01 * span).all()
    masses = np.array([c.mass_kg for c in cases])
    assert env.mass_min_kg <= masses.min() < env.mass_min_kg + 1.0
    assert env.mass_max_kg - 1.0 < masses.max() <= env.mass_max_kg


def test_cases_depend_on_seed_and_index_only(demo_vehicle):
    d = parse_dispersions(base_doc(), demo_vehicle)
    first = [d.case(i) for i in range(5)]
    # Drawing in another order, from a new object, gives the same cases.
    again = parse_dispersions(base_doc(), demo_vehicle)
    assert [again.case(i) for i in reversed(range(5))][::-1] == first
    assert d.with_seed(6).case(3) != first[3]
    assert len({c.position_m for c in first}) == 5


def test_draws_stay_inside_bounded_supports(demo_vehicle):
    d = parse_dispersions(base_doc(), demo_vehicle)
    for i in range(400):
        c = d.case(i)
        assert 1000.0 <= c.position_m[0] <= 2000.0
        assert 1200.0 <= c.position_m[2] <= 1800.0
        assert c.velocity_mps[1] == 0.0
        assert -60.0 <= c.velocity_mps[2] <= -20.0
        assert 1850.0 <= c.mass_kg <= 1900.0


def test_draws_follow_their_distributions(demo_vehicle):
    # Sample moments against the distributions' own (scipy.stats as the
    # independent reference for the truncated normal), within 5 standard
    # errors of the mean.
    doc = base_doc()
    doc["position_m"]["up"] = {"distribution": "truncated_normal", "mean": 1500.0, "std": 200.0,
                               "low": 1550.0, "high": 1900.0}   # both bounds above the mean
    d = parse_dispersions(doc, demo_vehicle)
    n = 4000
    cases = [d.case(i) for i in range(n)]
    x = np.array([c.position_m[0] for c in cases])
    y = np.array([c.position_m[1] for c in cases])
    up = np.array([c.position_m[2] for c in cases])
    tn = sps.truncnorm((1550.0 - 1500.0) / 200.0, (1900.0 - 1500.0) / 200.0, loc=1500.0, scale=200.0)
    for sample, mean, std in ((x, 1500.0, 1000.0 / math.sqrt(12.0)), (y, 0.0, 100.0),
                              (up, tn.mean(), tn.std())):
        assert abs(sample.mean() - mean) < 5.0 * std / math.sqrt(n)
        assert abs(sample.std() - std) < 0.1 * std
    assert up.min() >= 1550.0 and up.max() <= 1900.0
    # Kolmogorov-Smirnov against the exact distribution (scipy.stats).
    assert sps.kstest(up, tn.cdf).pvalue > 1e-4
    assert sps.kstest(y, sps.norm(0.0, 100.0).cdf).pvalue > 1e-4


def test_every_component_is_drawn_in_a_fixed_order():
    names = [f"{t}.{a}" if a else t for t, a in COMPONENTS]
    assert names == ["position_m.x", "position_m.y", "position_m.up", "velocity_mps.x",
                     "velocity_mps.y", "velocity_mps.up", "mass_kg", "time_of_flight_s",
                     "thrust_derate"]


def edit(path, value):
    doc = base_doc()
    parts = path.split(".")
    t = doc
    for p in parts[:-1]:
        t = t[p]
    if value is KeyError:
        del t[parts[-1]]
    else:
        t[parts[-1]] = value
    return doc


@pytest.mark.parametrize("path, value, field, words", [
    ("posiiton_m", {}, "posiiton_m", "did you mean 'position_m'"),
    ("position_m.y", KeyError, "position_m.y", "missing component"),
    ("position_m.z", {"distribution": "fixed", "value": 1.0}, "position_m.z", "unknown component"),
    ("position_m.y.std", 0.0, "position_m.y.std", "must be > 0"),
    ("position_m.x.high", 900.0, "position_m.x.low", "must be < position_m.x.high"),
    ("position_m.x.distribution", "unifrom", "position_m.x.distribution", "did you mean 'uniform'"),
    ("position_m.x.mean", 3.0, "position_m.x.mean", "unknown key for a uniform"),
    ("position_m.x.low", float("nan"), "position_m.x.low", "finite"),
    ("position_m.up", {"distribution": "normal", "mean": 1500.0, "std": 10.0},
     "position_m.up.distribution", "must be bounded"),
    ("position_m.up", {"distribution": "uniform", "low": -5.0, "high": 10.0},
     "position_m.up.low", "altitude must be > 0"),
    ("position_m.up", {"distribution": "truncated_normal", "mean": 0.0, "std": 1.0,
                       "low": 40.0, "high": 50.0}, "position_m.up.mean", "probability"),
    ("mass_kg", {"distribution": "uniform", "low": 1850.0, "high": 1950.0},
     "mass_kg.high", "mass_wet_kg"),
    ("mass_kg", {"distribution": "fixed", "value": 1400.0}, "mass_kg.value", "mass_dry_kg"),
    ("time_of_flight_s", "serach", "time_of_flight_s", "did you mean 'search'"),
    ("time_of_flight_s", {"distribution": "uniform", "low": 0.0, "high": 50.0},
     "time_of_flight_s.low", "must be > 0"),
    ("thrust_derate", {"distribution": "uniform", "low": 0.8, "high": 1.1},
     "thrust_derate.high", "(0, 1]"),
    ("seed", "7", "seed", "must be an integer"),
    ("seed", -1, "seed", "[0, 2**63)"),
])
def test_bad_files_name_field_value_and_rule(demo_vehicle, path, value, field, words):
    with pytest.raises(InputError) as err:
        parse_dispersions(edit(path, value), demo_vehicle)
    assert err.value.field == field
    assert words in str(err.value)


def test_unreadable_or_bad_toml(tmp_path):
    with pytest.raises(InputError, match="cannot be read"):
        load_dispersions(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("seed = = 3\n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_dispersions(bad)
