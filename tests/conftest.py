"""Shared fixtures: the invented demo vehicle and small helpers."""

import os
import re
import shutil
import subprocess
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


def chromium():
    """Debian's chromium (listed in .ci/debian-packages): a failure in CI, a skip elsewhere."""
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    if os.environ.get("CI"):
        pytest.fail("chromium is missing: .ci/debian-packages must list it")
    pytest.skip("chromium is not installed")


def render_in_chromium(html_path, tmp_path) -> dict:
    """Open a report in headless Chromium; its DOM after the page's script ran,
    the image counts the script wrote on <body>, and the console errors."""
    cmd = [chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr",
           "--v=0", "--virtual-time-budget=5000", "--dump-dom", Path(html_path).as_uri()]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    dom = done.stdout
    body = re.search(r"<body([^>]*)>", dom).group(1)

    def count(name):
        m = re.search(rf'{name}="(\d+)"', body)
        return int(m.group(1)) if m else None

    return {"dom": dom, "rendered": 'data-rendered="yes"' in body,
            "images": count("data-images"), "images_ok": count("data-images-ok"),
            "errors": [ln for ln in done.stderr.splitlines() if "CONSOLE" in ln or "Uncaught" in ln]}
