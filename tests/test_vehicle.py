"""Vehicle file validation: every refusal names the key, the value and the rule."""

import math

import pytest

from codegen.errors import InputError
from codegen.model.vehicle import load_vehicle, parse_vehicle
from conftest import DEMO_VEHICLE
import tomllib


def demo_dict():
    return tomllib.loads(DEMO_VEHICLE.read_text())


def refuse(data, field, words):
    with pytest.raises(InputError) as err:
        parse_vehicle(data)
    msg = str(err.value)
    assert err.value.field == field, msg
    assert field in msg
    for w in words:
        assert w in msg, msg
    return msg


def test_demo_file_loads_and_says_it_is_invented(demo_vehicle):
    assert "INVENTED" in DEMO_VEHICLE.read_text()
    assert demo_vehicle.name == "demo-lander"
    assert demo_vehicle.warnings == ()
    assert len(demo_vehicle.source_sha256) == 64


def test_unknown_key_suggests_nearest():
    d = demo_dict()
    d["mass_wet_kgs"] = d.pop("mass_wet_kg")
    # The unknown key is found before the missing one.
    msg = refuse(d, "mass_wet_kgs", ["unknown key", "did you mean 'mass_wet_kg'"])
    assert "1900" in msg


def test_missing_key():
    d = demo_dict()
    del d["isp_s"]
    refuse(d, "isp_s", ["missing required key"])


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf])
def test_non_finite_refused(value):
    d = demo_dict()
    d["thrust_max_n"] = value
    refuse(d, "thrust_max_n", ["finite"])


def test_dry_not_below_wet():
    d = demo_dict()
    d["mass_dry_kg"] = 1900.0
    refuse(d, "mass_dry_kg", ["1900.0", "must be < mass_wet_kg"])


@pytest.mark.parametrize("key,value", [("throttle_min", 0.0), ("throttle_max", 1.2),
                                       ("throttle_min", -0.1)])
def test_throttle_outside_unit_interval(key, value):
    d = demo_dict()
    d[key] = value
    refuse(d, key, ["(0, 1]"])


def test_throttle_min_above_max():
    d = demo_dict()
    d["throttle_min"], d["throttle_max"] = 0.9, 0.5
    refuse(d, "throttle_min", ["<= throttle_max"])


@pytest.mark.parametrize("key,value,rule", [("pointing_max_deg", 0.0, "(0, 180]"),
                                            ("pointing_max_deg", 190.0, "(0, 180]"),
                                            ("glide_slope_deg", 90.0, "[0, 90)"),
                                            ("glide_slope_deg", -1.0, "[0, 90)"),
                                            ("engine_cant_deg", 95.0, "[0, 90)")])
def test_angles_outside_range(key, value, rule):
    d = demo_dict()
    d[key] = value
    refuse(d, key, [rule])


def test_weak_thrust_warns_not_refuses():
    d = demo_dict()
    # 0.85 * 6000 N = 5100 N < 1450 kg * 3.7114 m/s^2 = 5381.5 N.
    d["thrust_max_n"] = 6000.0
    v = parse_vehicle(d)
    assert len(v.warnings) == 1 and "hover" in v.warnings[0]


def test_envelope_checks():
    d = demo_dict()
    d["envelope"]["position_min_m"] = [0.0, 0.0, -5.0]
    refuse(d, "envelope.position_min_m[2]", ["altitude"])
    d = demo_dict()
    d["envelope"]["mass_max_kg"] = 2000.0
    refuse(d, "envelope.mass_max_kg", ["mass_wet_kg"])
    d = demo_dict()
    d["envelope"]["velocity_min_mps"] = [-80.0, 30.0, -60.0]
    refuse(d, "envelope.velocity_min_mps[1]", ["<= envelope.velocity_max_mps[1]"])


def test_bad_toml_and_missing_file(tmp_path):
    bad = tmp_path / "v.toml"
    bad.write_text("mass_wet_kg = = 3\n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_vehicle(bad)
    with pytest.raises(InputError, match="cannot be read"):
        load_vehicle(tmp_path / "nope.toml")


def test_derived_bounds_include_engine_cant():
    from conftest import paper_example_vehicle
    v = paper_example_vehicle()
    # Net thrust bounds of the paper example: about 4972 N and 13258 N
    # (Açıkmeşe & Ploen 2007, J. Guidance, Control, and Dynamics 30(5): six
    # 3100 N engines canted 27 deg at 0.3 and 0.8 throttle, 6 x 3100 x
    # cos 27 deg x 0.3 and x 0.8). Recalled and approximate: the values as
    # widely reproduced, not read from the paper's tables.
    assert v.thrust_lower_n == pytest.approx(4972, abs=1.0)
    assert v.thrust_upper_n == pytest.approx(13258, abs=1.0)
