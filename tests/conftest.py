"""Shared fixtures: the invented demo vehicle and small helpers."""

from pathlib import Path

import pytest

from codegen.model.vehicle import load_vehicle, parse_vehicle

ROOT = Path(__file__).resolve().parent.parent
DEMO_VEHICLE = ROOT / "examples" / "demo_vehicle.toml"

#: A nominal state inside the demo envelope: position (m), velocity (m/s), mass (kg).
DEMO_STATE = ([1500.0, 0.0, 1500.0], [-50.0, 0.0, -40.0], 1900.0)


@pytest.fixture(scope="session")
def demo_vehicle():
    return load_vehicle(DEMO_VEHICLE)


def paper_example_vehicle():
    """The Mars example of Açıkmeşe & Ploen 2007 ("Convex programming approach
    to powered descent guidance for Mars landing", J. Guidance, Control, and
    Dynamics 30(5)) and Blackmore, Açıkmeşe & Scharf 2010 ("Minimum-landing-
    error powered-descent guidance for Mars landing using convex
    optimization", J. Guidance, Control, and Dynamics 33(4)): six 3100 N
    engines canted 27 deg, throttle 0.3-0.8, Isp 225 s, 1905/1505 kg, glide
    slope 4 deg, no pointing limit, Mars gravity 3.7114 m/s^2, from
    (2000, 0, 1500) m at (100, 0, -75) m/s. Recalled and approximate: these
    are the values as widely reproduced, not read from the papers' tables.
    The speed limit is not part of the example; it is set high enough never
    to bind."""
    return parse_vehicle(dict(
        name="paper-example", mass_wet_kg=1905.0, mass_dry_kg=1505.0,
        thrust_max_n=6 * 3100.0, throttle_min=0.3, throttle_max=0.8, isp_s=225.0,
        engine_cant_deg=27.0, pointing_max_deg=180.0, glide_slope_deg=4.0,
        speed_max_mps=500.0, gravity_mps2=3.7114,
        envelope=dict(position_min_m=[0.0, 0.0, 1000.0], position_max_m=[2000.0, 0.0, 1500.0],
                      velocity_min_mps=[100.0, 0.0, -75.0], velocity_max_mps=[100.0, 0.0, -75.0])))
