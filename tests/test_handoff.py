"""`pdgc handoff`: the package for flight-software engineers, and its target checks.

One package is built (module fixture) from a native tree at N = 10 with a tiny
envelope campaign, with all target checks. The tests then check the package
itself (layout, hashes, reproducible tarball, no absolute paths, nothing that
needs Python), re-run its own make targets from the extracted tarball (host,
qemu-arm, Cortex-M7) and show that the runner fails when an expected output
is wrong. Tools for the target checks are Debian packages listed in
.ci/debian-packages: in CI (CI=true) a missing tool is a failure with its
name; elsewhere the tests that need it are skipped.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import os
import re
import shutil
import subprocess
import tarfile
from html.parser import HTMLParser
from pathlib import Path

import pytest

from codegen import cli
from codegen.verify.handoff import tools as H
from codegen.verify.handoff.package import TAR_MTIME
from codegen.verify.handoff.run import handoff
from codegen.verify.handoff.toolout import worst_stack
from codegen.errors import InputError
from conftest import DEMO_VEHICLE, ROOT, render_in_chromium

HORIZON = 10
IN_CI = os.environ.get("CI") == "true"


def need(*tools):
    """Skip (locally) or fail (CI=true) when a tool of the target checks is missing."""
    missing = [t for t in tools if shutil.which(t) is None]
    if missing:
        msg = (f"missing tools for the hand-off target checks: {', '.join(missing)} "
               f"(Debian packages in .ci/debian-packages)")
        if IN_CI:
            pytest.fail(msg)
        pytest.skip(msg)


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    base = tmp_path_factory.mktemp("handoff")
    tree = base / "demo10"
    assert cli.main(["generate", str(DEMO_VEHICLE), "--horizon", str(HORIZON), "--backend",
                     "native", "--out", str(tree)]) == 0
    run = base / "campaign"
    assert cli.main(["envelope", str(tree), "--dispersions", str(ROOT / "examples" /
                     "demo_dispersions.toml"), "--cases", "4", "--workers", "1",
                     "--reference-every", "2", "--out", str(run), "--no-progress"]) == 0
    pkg = base / "out" / "demo10-pkg"
    result = handoff(tree, pkg, campaign=run, check_cases=10)
    return {"base": base, "tree": tree, "run": run, "pkg": pkg, "result": result,
            "tarball": Path(result["tarball"])}


def extract(built, dest: Path) -> Path:
    with tarfile.open(built["tarball"]) as tar:
        tar.extractall(dest, filter="data")
    return dest / built["pkg"].name


def make(pkg: Path, *targets, timeout=900):
    p = subprocess.run(["make", "-s", *targets], cwd=pkg, stdout=subprocess.PIPE,
                       stderr=subprocess.STDOUT, text=True, timeout=timeout)
    return p.returncode, p.stdout


# -- refusals ------------------------------------------------------------------------

def test_refuses_a_cvxpygen_tree_naming_the_backend(built, tmp_path):
    tree = tmp_path / "t"
    shutil.copytree(built["tree"], tree)
    man = json.loads((tree / "manifest.json").read_text())
    man["backend"] = "cvxpygen-ecos"
    (tree / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(InputError) as exc:
        handoff(tree, tmp_path / "pkg", checks=False)
    assert exc.value.field == "DIR" and "cvxpygen-ecos" in str(exc.value)
    assert "native" in exc.value.rule
    assert not (tmp_path / "pkg").exists()


def test_refuses_an_edited_tree(built, tmp_path):
    tree = tmp_path / "t"
    shutil.copytree(built["tree"], tree)
    src = tree / "src" / "pdg_guidance.c"
    src.write_text(src.read_text() + "\n/* edited */\n")
    with pytest.raises(InputError) as exc:
        handoff(tree, tmp_path / "pkg", checks=False)
    assert "src/pdg_guidance.c" in str(exc.value)


def test_refuses_a_campaign_of_another_tree(built, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(built["run"], run)
    man = json.loads((run / "manifest.json").read_text())
    man["solver_manifest_sha256"] = "0" * 64
    (run / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(InputError) as exc:
        handoff(built["tree"], tmp_path / "pkg", campaign=run, checks=False)
    assert exc.value.field == "--campaign" and "different tree" in exc.value.rule


def test_refuses_to_replace_a_directory_that_is_no_package(built, tmp_path):
    out = tmp_path / "precious"
    out.mkdir()
    (out / "notes.txt").write_text("keep me")
    with pytest.raises(InputError) as exc:
        handoff(built["tree"], out, checks=False)
    assert exc.value.field == "--out"
    assert (out / "notes.txt").read_text() == "keep me"


def test_cli_exit_codes(built, tmp_path, capsys):
    tree = tmp_path / "t"
    shutil.copytree(built["tree"], tree)
    man = json.loads((tree / "manifest.json").read_text())
    man["backend"] = "cvxpygen-qoco"
    (tree / "manifest.json").write_text(json.dumps(man))
    assert cli.main(["handoff", str(tree), "--out", str(tmp_path / "p"), "--no-checks"]) == 2
    assert "cvxpygen-qoco" in capsys.readouterr().err


# -- the package ----------------------------------------------------------------------

def test_layout_hashes_and_generated_files_unchanged(built):
    pkg = built["pkg"]
    files = sorted(str(p.relative_to(pkg)) for p in pkg.rglob("*") if p.is_file())
    for must in ("Makefile", "CMakeLists.txt", "README.md", "vehicle.toml", "MANIFEST.sha256",
                 "generation-manifest.json", "include/pdg_guidance.h", "solver/pdg_socp.c",
                 "app/pdg_plan_once.c", "test/pdg_test_runner.c", "test/pdg_vectors.c",
                 "test/pdg_vectors.h", "record/verification.md", "record/verification.html"):
        assert must in files, must
    assert not [f for f in files if f.endswith((".py", ".pyc", ".o", ".a"))]
    # MANIFEST.sha256 lists every other file with its hash.
    listed = {}
    for line in (pkg / "MANIFEST.sha256").read_text().splitlines():
        digest, rel = line.split("  ", 1)
        listed[rel] = digest
    assert sorted(listed) == [f for f in files if f != "MANIFEST.sha256"]
    for rel, digest in listed.items():
        assert sha((pkg / rel).read_bytes()) == digest, rel
    # Generated files are the tree's, byte for byte, except the three the package replaces.
    gen = json.loads((pkg / "generation-manifest.json").read_text())
    assert (pkg / "generation-manifest.json").read_bytes() == (built["tree"] / "manifest.json").read_bytes()
    for rel, digest in gen["files"].items():
        if rel in ("Makefile", "CMakeLists.txt", "README.md"):
            continue
        assert sha((pkg / rel).read_bytes()) == digest, rel


def test_no_absolute_paths_and_nothing_needs_python(built):
    pkg = built["pkg"]
    roots = {str(built["base"]), str(Path.home()), str(ROOT), "/tmp/"}
    for p in pkg.rglob("*"):
        if not p.is_file():
            continue
        text = p.read_text(errors="replace")
        for r in roots:
            assert r not in text, (p, r)
        if p.name in ("Makefile", "CMakeLists.txt"):
            rules = [ln for ln in text.splitlines() if not ln.lstrip().startswith("#")]
            assert not [ln for ln in rules if "python" in ln.lower()], p


def test_tarball_is_reproducible_in_form(built):
    data = built["tarball"].read_bytes()
    assert data[:2] == b"\x1f\x8b"
    assert data[4:8] == b"\x00\x00\x00\x00", "gzip header mtime must be 0"
    with tarfile.open(built["tarball"]) as tar:
        members = tar.getmembers()
        names = [m.name for m in members]
        assert names == sorted(names)
        root = built["pkg"].name
        assert all(n == root or n.startswith(root + "/") for n in names)
        for m in members:
            assert m.mtime == TAR_MTIME and m.uid == 0 and m.gid == 0
            assert m.uname == "" and m.gname == ""
            assert m.mode == (0o755 if m.isdir() else 0o644)
            if m.isfile():
                rel = m.name[len(root) + 1:]
                assert tar.extractfile(m).read() == (built["pkg"] / rel).read_bytes(), rel
    files = [p for p in built["pkg"].rglob("*") if p.is_file()]
    assert len([m for m in members if m.isfile()]) == len(files)


def test_same_inputs_give_the_same_bytes(built, tmp_path):
    """Two runs (without the target checks, whose figures belong to the machine)
    into different parents give byte-identical tarballs."""
    outs = []
    for parent in ("a", "b"):
        r = handoff(built["tree"], tmp_path / parent / "pkg", campaign=built["run"],
                      checks=False)
        outs.append(Path(r["tarball"]).read_bytes())
    assert outs[0] == outs[1]
    gz = gzip.decompress(outs[0])
    assert str(tmp_path).encode() not in gz


def test_vectors_cover_the_envelope_and_the_refusals(built):
    r = built["result"]
    src = (built["pkg"] / "test" / "pdg_vectors.c").read_text()
    kinds = re.findall(r'^\s+"[^"]+", "([a-z_]+)", "(reference|contract)",', src, re.M)
    assert len(kinds) == r["vectors"]
    assert {k for k, _ in kinds} == {"middle", "inside", "edge", "outside", "unreachable",
                                    "input_refused", "contract"}
    hdr = (built["pkg"] / "test" / "pdg_vectors.h").read_text()
    assert f"#define PDG_TV_COUNT {r['vectors']}" in hdr
    statuses = re.findall(r"PDG_(TARGET_MET|UNREACHABLE|INPUT_REFUSED|ITERATIONS_EXHAUSTED),", src)
    assert {"TARGET_MET", "UNREACHABLE", "INPUT_REFUSED", "ITERATIONS_EXHAUSTED"} <= set(statuses)
    # Tolerances stated in the header are the project's check tolerances.
    from codegen.verify.check import TOLERANCES
    assert f"PDG_TV_FUEL_REL_FIXED {TOLERANCES['double']['objective_rel']!r}" in hdr
    assert f"PDG_TV_FUEL_REL_SEARCHED {TOLERANCES['double']['fuel_rel_search']!r}" in hdr


# -- the package's own builds, from the extracted tarball ---------------------------

def test_make_test_passes_on_the_host(built, tmp_path):
    need("cc", "make")
    pkg = extract(built, tmp_path)
    code, out = make(pkg, "test")
    n = built["result"]["vectors"]
    assert code == 0, out
    assert f"SUMMARY vectors {n} passed {n} failed 0" in out
    assert out.count("\nPASS ") == n


def test_runner_fails_on_a_wrong_expected_output(built, tmp_path):
    """The runner is a real check: a changed expected fuel, status or position fails it."""
    need("cc", "make")
    pkg = extract(built, tmp_path)
    path = pkg / "test" / "pdg_vectors.c"
    src = path.read_text()
    # The first fixed-tof vector's expected fuel, +0.1 %.
    m = re.search(r'"middle-fixed", .*?PDG_TARGET_MET, ([^,]+), ([^,]+),', src, re.S)
    fuel = float(m.group(2))
    bad = src[:m.start(2)] + repr(fuel * 1.001) + src[m.end(2):]
    path.write_text(bad)
    code, out = make(pkg, "test")
    assert code != 0
    assert re.search(r"^FAIL +\d+ middle-fixed .*fuel", out, re.M), out
    assert "failed 1" in out
    # An expected status flipped: the searched middle vector says infeasible.
    m = re.search(r'"middle-searched", .*?(PDG_TARGET_MET)', src, re.S)
    path.write_text(src[:m.start(1)] + "PDG_UNREACHABLE" + src[m.end(1):])
    code, out = make(pkg, "test")
    assert code != 0 and re.search(r"^FAIL +\d+ middle-searched .*status target_met, expected "
                                   r"unreachable", out, re.M), out
    # One expected position moved by 1 m (tolerance 0.2 m for this vehicle).
    m = re.search(r"static const double position_1\[\d+\]\[3\] = \{\n    \{ ([^,]+),", src)
    x = float(m.group(1))
    path.write_text(src[:m.start(1)] + repr(x + 1.0) + src[m.end(1):])
    code, out = make(pkg, "test")
    assert code != 0 and re.search(r"^FAIL .*position differs", out, re.M), out


def test_make_test_passes_under_qemu_arm(built, tmp_path):
    need("make", "arm-linux-gnueabihf-gcc", "qemu-arm")
    assert Path(H.ARMHF_SYSROOT).is_dir() or not IN_CI, "libc6-dev-armhf-cross missing"
    pkg = extract(built, tmp_path)
    code, out = make(pkg, "test-qemu")
    n = built["result"]["vectors"]
    assert code == 0, out
    assert f"SUMMARY vectors {n} passed {n} failed 0" in out
    assert "qemu-arm -L" in out or (pkg / "build" / "armhf" / "pdg_test_runner").exists()
    p = subprocess.run(["file", str(pkg / "build" / "armhf" / "pdg_test_runner")],
                       stdout=subprocess.PIPE, text=True) if shutil.which("file") else None
    if p is not None:
        assert "ARM" in p.stdout


def test_make_cortex_m7_matches_the_record(built, tmp_path):
    need("make", "arm-none-eabi-gcc", "arm-none-eabi-size")
    pkg = extract(built, tmp_path)
    code, out = make(pkg, "cortex-m7")
    assert code == 0, out
    m = re.search(r"^\s*(\d+)\s+(\d+)\s+(\d+)\s+\d+\s+[0-9a-f]+\s+\(TOTALS\)", out, re.M)
    assert m, out
    rec = built["result"]["checks"]["cortex_m7"]["double"]["size"]["total"]
    assert [int(g) for g in m.groups()] == [rec["text"], rec["data"], rec["bss"]]
    assert rec["text"] > 0


# -- the target checks as recorded ----------------------------------------------------

def test_strict_host_build_of_every_file(built):
    need("cc")
    strict = built["result"]["checks"]["strict"]
    c_files = sorted(str(p.relative_to(built["pkg"])) for p in built["pkg"].rglob("*.c"))
    assert sorted(s["file"] for s in strict) == c_files
    failing = [s["file"] for s in strict if not s["passes"]]
    assert not failing, f"files failing {H.STRICT_FLAGS}: {failing}"


def test_cppcheck_finds_nothing_in_the_handoff_files(built):
    need("cppcheck")
    findings = built["result"]["checks"]["cppcheck_findings"]
    assert findings is not None
    ours = [f for f in findings if f.startswith("test/")]
    assert not ours, ours


def test_cppcheck_finds_nothing_in_the_whole_package(built):
    need("cppcheck")
    findings = built["result"]["checks"]["cppcheck_findings"]
    assert findings == [], findings


def test_cortex_m7_builds_sizes_and_stack(built):
    need("arm-none-eabi-gcc", "arm-none-eabi-size", "arm-none-eabi-nm")
    m7 = built["result"]["checks"]["cortex_m7"]
    for key, fpu in (("double", "-mfpu=fpv5-d16"), ("single", "-mfpu=fpv5-sp-d16")):
        m = m7[key]
        assert m["built"] and fpu in m["flags"] and "-mcpu=cortex-m7" in m["flags"]
        assert m["strict_failures"] == [], (key, m["strict_failures"])
        t = m["size"]["total"]
        assert t["text"] == sum(o["text"] for o in m["size"]["objects"]) > 0
        st = m["stack"]
        assert "error" not in st and st["cycle"] == []
        assert st["path"][0][0] == "pdg_plan_descent"
        assert st["bytes"] == sum(b for _, b in st["path"]) > 0
        assert m["sizeof"]["workspace"] > 0 and m["sizeof"]["plan"] > 0
    # Single precision: the solver's reals are floats, so its workspace is smaller.
    assert m7["single"]["sizeof"]["workspace"] < m7["double"]["sizeof"]["workspace"]
    # On the double-precision FPU no double arithmetic is left to software.
    assert not [s for s in m7["double"]["soft_double"] if s not in ("__aeabi_d2f", "__aeabi_f2d")]


def test_worst_stack_follows_the_deepest_path():
    ci = ('graph: { title: "x.c"\n'
          'node: { title: "top" label: "top\\nx.c:1:1\\n16 bytes (static)" }\n'
          'node: { title: "a" label: "a\\nx.c:2:1\\n100 bytes (static)" }\n'
          'node: { title: "b" label: "b\\nx.c:3:1\\n40 bytes (static)" }\n'
          'node: { title: "c" label: "c\\nx.c:4:1\\n90 bytes (static)" }\n'
          'node: { title: "sqrt" label: "sqrt\\nmath.h:1:1" shape : ellipse }\n'
          'edge: { sourcename: "top" targetname: "a" label: "x" }\n'
          'edge: { sourcename: "top" targetname: "b" label: "x" }\n'
          'edge: { sourcename: "b" targetname: "c" label: "x" }\n'
          'edge: { sourcename: "c" targetname: "sqrt" label: "x" }\n}\n')
    st = worst_stack([ci], "top")
    assert st["bytes"] == 16 + 40 + 90
    assert [f for f, _ in st["path"]] == ["top", "b", "c"]
    assert st["external"] == ["sqrt"]


def test_coverage_of_the_solver_by_the_vectors(built):
    need("cc", "gcov")
    cov = built["result"]["checks"]["coverage"]
    assert cov["passed"]
    files = {c["file"]: c for c in cov["files"]}
    assert {"src/pdg_guidance.c", "src/pdg_backend.c", "solver/pdg_socp.c"} <= set(files)
    for c in files.values():
        assert 0 < c["executed"] <= c["lines"]


def test_solver_check_is_in_the_record_and_passes(built):
    sc = built["result"]["solver_check"]
    assert sc["cases"] == 10 and sc["seed"] == 1
    assert sc["failures"] == 0, sc["failed_cases"]
    assert sc["status_agreement"] == sc["cases"]
    md = (built["pkg"] / "record" / "verification.md").read_text()
    assert "## Generated solver against the reference" in md
    assert f"| status agreement | {sc['status_agreement']} of {sc['cases']} |" in md


def test_all_checks_pass_and_the_runs_agree(built):
    need(*H.REQUIRED_TOOLS)
    c = built["result"]["checks"]
    assert c["not_run"] == []
    for key in ("host", "qemu"):
        assert c[key]["passed"], c[key]["failures"]
        assert c[key]["vectors"] == built["result"]["vectors"]


# -- the record ---------------------------------------------------------------------

class _Text(HTMLParser):
    def __init__(self):
        super().__init__()
        self.parts, self.ids = [], []

    def handle_starttag(self, tag, attrs):
        self.ids += [v for k, v in attrs if k == "id"]

    def handle_data(self, data):
        self.parts.append(data)


def test_record_states_the_figures(built):
    pkg, r = built["pkg"], built["result"]
    md = (pkg / "record" / "verification.md").read_text()
    html = (pkg / "record" / "verification.html").read_text()
    p = _Text()
    p.feed(html)
    text = " ".join(p.parts)
    for title in ("Caution", "Identification", "Software versions", "Vehicle constants",
                  "Horizon and settings", "Test vectors", "Envelope campaign", "Manifest"):
        assert f"## {title}" in md and title in text
    # the versions that made the tree and this package (codegen.versions)
    from codegen import versions
    now = versions.installed()
    for name, ver in now["packages"].items():
        assert f"| {name} | {ver} | {ver} |" in md, name
    assert f"| Python | {now['python']} | {now['python']} |" in md
    assert r["environment"] == now and r["tree_environment"] == now
    for phrase in ("NOT flight-qualified", "independent verification and validation",
                   "software assurance", "licensed engineer"):
        assert phrase in md and phrase in text
    assert "mass_wet_kg" in md and "1900.0" in md
    assert f"{r['vectors']} vectors" in md
    tol = r["tolerances"]
    assert f"{tol['fuel_rel_fixed']:.4g}" in md and f"{tol['tof_abs_searched_s']:.4g}" in md
    # campaign summary
    summary = json.loads((built["run"] / "summary.json").read_text())
    assert f"{summary['cases_done']} of {summary['cases_planned']}" in md
    # manifest with hashes
    for rel in ("solver/pdg_socp.c", "test/pdg_vectors.c"):
        assert f"| {rel} | {sha((pkg / rel).read_bytes())} |" in md
    if r["checks"] is not None and not r["checks"]["not_run"]:
        for title in ("Check results", "Compilers and flags", "Strict build", "Static analysis",
                      "Test-vector results", "Cortex-M7, double-precision FPU",
                      "Cortex-M7, single-precision FPU", "Coverage"):
            assert f"## {title}" in md and title in text, title
        m7 = r["checks"]["cortex_m7"]["double"]
        assert f"**{m7['stack']['bytes']} B**" in md
        assert f"`sizeof(pdg_workspace)` = {m7['sizeof']['workspace']} B" in md
        t = m7["size"]["total"]
        assert f"| total | {t['text']} | {t['data']} | {t['bss']} |" in md
        assert H.STRICT_FLAGS in md and H.M7_SP_FLAGS in md
        for c in r["checks"]["coverage"]["files"]:
            assert f"| {c['file']} | {c['lines']} | {c['executed']} |" in md
    assert "<script src" not in html and "http" not in html.replace("http-equiv", "")


def test_record_renders_in_headless_chromium(built, tmp_path):
    page = render_in_chromium(built["pkg"] / "record" / "verification.html", tmp_path)
    assert page["rendered"] and page["images"] == page["images_ok"] == 0
    for anchor in ("caution", "identification", "vehicle-constants", "test-vectors", "manifest"):
        assert f'id="{anchor}"' in page["dom"]
    assert page["errors"] == []


def test_expected_outputs_in_the_c_data_are_the_reference_answers(built, demo_vehicle):
    """The C data holds the reference's answer exactly (repr round-trips): solve the
    middle fixed-tof vector again with the reference and compare with what the file says."""
    from codegen.reference import ReferenceSolver
    src = (built["pkg"] / "test" / "pdg_vectors.c").read_text()
    m = re.search(r'"middle-fixed", "middle", "reference",\s*\{ \{ ([^}]+) \},\s*\{ ([^}]+) \},'
                  r'\s*([^,]+), ([^,]+),.*?PDG_TARGET_MET, ([^,]+), ([^,]+), ([^,]+),', src, re.S)
    assert m, "middle-fixed vector not found"
    pos = [float(x) for x in m.group(1).split(",")]
    vel = [float(x) for x in m.group(2).split(",")]
    mass, tof = float(m.group(3)), float(m.group(4))
    exp_tof, exp_fuel, exp_obj = (float(m.group(i)) for i in (5, 6, 7))
    assert exp_tof == tof
    env = demo_vehicle.envelope
    assert pos == [(a + b) / 2.0 for a, b in zip(env.position_min_m, env.position_max_m)]
    r = ReferenceSolver(demo_vehicle, HORIZON).solve(pos, vel, mass, tof, fallback=False)
    assert r.status == "target_met"
    assert abs(r.fuel_kg - exp_fuel) <= 1e-12 * exp_fuel
    assert abs(r.objective - exp_obj) <= 1e-12 * abs(exp_obj)
