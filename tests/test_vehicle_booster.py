"""The booster additions of the vehicle file (issue 19): every refusal names
the key, the value and the rule; a file without them loads as before."""

import tomllib
from pathlib import Path

import pytest

from codegen.errors import InputError
from codegen.model.vehicle import load_vehicle, parse_vehicle
from conftest import DEMO_VEHICLE

BOOSTER = Path(__file__).resolve().parent.parent / "examples" / "demo_booster.toml"


def booster_dict():
    return tomllib.loads(BOOSTER.read_text())


def refuse(data, field, words=()):
    with pytest.raises(InputError) as err:
        parse_vehicle(data)
    msg = str(err.value)
    assert err.value.field == field, msg
    for w in words:
        assert w in msg, msg
    return msg


def test_demo_booster_loads_and_says_it_is_invented():
    assert "INVENTED" in BOOSTER.read_text()
    v = load_vehicle(BOOSTER)
    b = v.booster
    assert b.has_drag and b.drag.is_table and b.atmosphere.model == "standard_1976"
    assert b.thrust_rate_max_nps == 400000.0 and b.final_approach.cone_half_angle_deg == 15.0
    assert v.as_dict()["drag"]["mach"][0] == 0.0


def test_lander_has_no_booster_additions():
    assert load_vehicle(DEMO_VEHICLE).booster is None
    assert "drag" not in load_vehicle(DEMO_VEHICLE).as_dict()


def test_constant_drag_and_exponential_atmosphere():
    d = booster_dict()
    d["drag"] = {"drag_area_m2": 8.0}
    d["atmosphere"] = {"model": "exponential", "density_sea_level_kgpm3": 1.225,
                       "scale_height_m": 8500.0}
    b = parse_vehicle(d).booster
    assert not b.drag.is_table and b.drag.drag_coefficient == (8.0,)
    d["drag"] = {"drag_area_m2": 0.0}
    assert not parse_vehicle(d).booster.has_drag


@pytest.mark.parametrize("edit,field,words", [
    (lambda d: d["drag"].update(mach=[0.0, 0.5, 0.5, 1.0, 2.0, 3.0]), "drag.mach[2]",
     ["strictly increasing"]),
    (lambda d: d["drag"].update(drag_coefficient=[0.7, 0.8]), "drag.drag_coefficient",
     ["as many entries"]),
    (lambda d: d["drag"].update(drag_area_m2=5.0), "drag.reference_area_m2", ["not both"]),
    (lambda d: d["drag"].update(drag_coefficient=[0.7, -0.1, 1, 1, 1, 1]),
     "drag.drag_coefficient[1]", [">= 0"]),
    (lambda d: d["drag"].update(cd_table=1), "drag.cd_table", ["unknown key"]),
    (lambda d: d.pop("atmosphere"), "drag", ["[atmosphere]"]),
    (lambda d: d["atmosphere"].update(model="isa"), "atmosphere.model", ["standard_1976"]),
    (lambda d: d["atmosphere"].update(scale_height_m=8000.0), "atmosphere.scale_height_m",
     ["exponential"]),
    (lambda d: d["atmosphere"].update(site_altitude_m=85000.0), "atmosphere.site_altitude_m",
     ["86000"]),
    (lambda d: d.update(thrust_rate_max_nps=-1.0), "thrust_rate_max_nps", ["> 0"]),
    (lambda d: d["final_approach"].update(altitude_min_m=50.0), "final_approach",
     ["exactly one"]),
    (lambda d: d["final_approach"].update(cone_half_angle_deg=90.0),
     "final_approach.cone_half_angle_deg", ["(0, 90)"]),
    (lambda d: d["final_approach"].pop("duration_s"), "final_approach.duration_s",
     ["missing"]),
])
def test_refusals_name_field_value_rule(edit, field, words):
    d = booster_dict()
    edit(d)
    refuse(d, field, words)


def test_exponential_mach_table_needs_sound_speed():
    d = booster_dict()
    d["atmosphere"] = {"model": "exponential", "density_sea_level_kgpm3": 1.225,
                       "scale_height_m": 8500.0}
    refuse(d, "atmosphere.sound_speed_mps", ["speed of sound"])
    d["atmosphere"]["sound_speed_mps"] = 330.0
    assert parse_vehicle(d).booster.atmosphere.sound_speed_mps == 330.0


def test_altitude_min_below_lowest_start():
    d = booster_dict()
    d["final_approach"] = {"duration_s": 5.0, "altitude_min_m": 3000.0}
    refuse(d, "final_approach.altitude_min_m", ["envelope.position_min_m[2]"])
