"""Every generated README and every report carries the one caution
(templates/caution.j2): not flight-qualified, the program's own verification
and validation, the applicable standards and licensed engineering review
(the project's rule). Only the invented demo vehicle is called invented.
"""

from __future__ import annotations

import re
from html.parser import HTMLParser

import pytest

from codegen.emit import generate
from codegen.model.vehicle import DEMO_VEHICLE_NAME
from codegen.report import caution_text
from codegen.sim.batch import run_batch
from codegen.sim.error_model import ErrorModel
from codegen.sim.settings import default_settings
from codegen.sim.tree import load_guidance_solver, write_dry_run_tree
from codegen.verify.dispersions import load_dispersions
from codegen.verify.envelope.report import write_report
from codegen.verify.envelope.run import prepare_run, run_campaign
from codegen.verify.handoff.run import handoff
from conftest import DEMO_VEHICLE, ROOT

USER_VEHICLE = "my-lander"
DEMO_SENTENCE = "is the invented demo vehicle"


class _Text(HTMLParser):
    def __init__(self):
        super().__init__()
        self.parts = []

    def handle_data(self, data):
        self.parts.append(data)


def words(text: str, html: bool = False) -> str:
    """The prose of a Markdown or HTML document, whitespace collapsed."""
    if html:
        p = _Text()
        p.feed(text)
        text = " ".join(p.parts)
    text = text.replace("**", "").replace("\n> ", "\n")
    return " ".join(text.split())


def assert_caution(text: str, vehicle_name, html: bool = False) -> None:
    prose = words(text, html)
    assert caution_text(vehicle_name) in prose
    low = prose.lower()
    for phrase in ("not flight-qualified", "verification and validation",
                   "applicable standards", "licensed engineer"):
        assert phrase in low
    assert (DEMO_SENTENCE in prose) == (vehicle_name == DEMO_VEHICLE_NAME)


def test_caution_names_the_demo_vehicle_invented_and_no_other():
    assert DEMO_SENTENCE in caution_text(DEMO_VEHICLE_NAME)
    assert DEMO_SENTENCE not in caution_text(USER_VEHICLE)
    assert DEMO_SENTENCE not in caution_text(None)
    assert f'name = "{DEMO_VEHICLE_NAME}"' in DEMO_VEHICLE.read_text()


def test_committed_demo_tree_readme():
    assert_caution((ROOT / "generated" / "demo" / "README.md").read_text(), DEMO_VEHICLE_NAME)


@pytest.fixture(scope="module")
def user_vehicle(tmp_path_factory):
    path = tmp_path_factory.mktemp("user") / "vehicle.toml"
    text = DEMO_VEHICLE.read_text().replace(f'name = "{DEMO_VEHICLE_NAME}"',
                                            f'name = "{USER_VEHICLE}"')
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def dry_tree(user_vehicle):
    return write_dry_run_tree(user_vehicle.parent / "dry", user_vehicle, 5)


def test_generated_readme(user_vehicle, tmp_path):
    generate(user_vehicle, 5, tmp_path / "tree")
    assert_caution((tmp_path / "tree" / "README.md").read_text(), USER_VEHICLE)


def test_envelope_report(dry_tree, tmp_path):
    disp = ROOT / "examples" / "demo_dispersions.toml"
    run = tmp_path / "run"
    man = prepare_run(run, dry_tree, load_dispersions(disp), disp, 2, 1, 100)
    run_campaign(run, man, workers=1, progress=False)
    write_report(run, 2)
    assert_caution((run / "report.html").read_text(), USER_VEHICLE, html=True)


def test_simulation_report(dry_tree, tmp_path):
    solver = load_guidance_solver(dry_tree)
    settings = default_settings(solver.vehicle, rate_hz=0.0)
    run_batch(dry_tree, 1, 1, ErrorModel(), settings, tmp_path / "sim", solver=solver)
    assert_caution((tmp_path / "sim" / "report.html").read_text(), USER_VEHICLE, html=True)


def test_handoff_readme_and_record(user_vehicle, tmp_path):
    tree = tmp_path / "tree"
    generate(user_vehicle, 5, tree)
    handoff(tree, tmp_path / "pkg", checks=False, check_cases=0)
    pkg = tmp_path / "pkg"
    assert_caution((pkg / "README.md").read_text(), USER_VEHICLE)
    assert_caution((pkg / "record" / "verification.md").read_text(), USER_VEHICLE)
    html = (pkg / "record" / "verification.html").read_text()
    assert_caution(html, USER_VEHICLE, html=True)
    assert re.search(r'<p class="caution">', html)
