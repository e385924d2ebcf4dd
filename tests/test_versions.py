"""Every tree names the versions it came from; `pdgc check` says when they differ."""

import json
import platform
import re
from importlib import metadata

import pytest

from codegen import __version__, cli, versions
from codegen.emit import generate, verify_tree
from codegen.verify.handoff import record as H
from conftest import DEMO_VEHICLE, ROOT


def locked_version(name):
    m = re.search(rf"^{re.escape(name)}==(\S+)", (ROOT / "requirements.lock").read_text(),
                  re.MULTILINE | re.IGNORECASE)
    return m.group(1) if m else None


def test_installed_names_python_pdgc_and_the_locked_packages():
    now = versions.installed()
    assert now["python"] == platform.python_version()
    assert list(now["packages"]) == ["pdgc", "cvxpy", "cvxpygen", "clarabel", "ecos", "qocogen",
                                     "qoco", "scs", "numpy", "scipy", "jinja2"]
    assert now["packages"]["pdgc"] == __version__
    for name, ver in now["packages"].items():
        if name != "pdgc":
            assert ver == metadata.version(name) == locked_version(name), name


def test_differences():
    now = {"python": "3.11.7", "packages": {"pdgc": "0.1.0", "cvxpy": "1.9.3", "numpy": "2.4.6"}}
    assert versions.differences(now, now) == []
    old = {"python": "3.11.6", "packages": {"pdgc": "0.1.0", "cvxpy": "1.9.2", "gone": "1"}}
    assert versions.differences(old, now) == [
        ("python", "3.11.6", "3.11.7"), ("cvxpy", "1.9.2", "1.9.3"), ("numpy", None, "2.4.6"),
        ("gone", "1", None)]
    assert versions.differences(None, now) == [("versions", None,
                                                "this tree's manifest records none")]


@pytest.fixture(scope="module")
def small_tree(tmp_path_factory):
    out = tmp_path_factory.mktemp("versions") / "tree"
    generate(DEMO_VEHICLE, 4, out, backend="native")
    return out


def test_manifest_records_the_environment(small_tree):
    m = verify_tree(small_tree)
    assert m["environment"] == versions.installed()
    text = (small_tree / "manifest.json").read_text()
    assert f'"cvxpy": "{metadata.version("cvxpy")}"' in text


def test_check_warns_once_per_differing_package(small_tree, tmp_path, capsys):
    import shutil
    tree = tmp_path / "tree"
    shutil.copytree(small_tree, tree)
    m = json.loads((tree / "manifest.json").read_text())
    m["environment"]["packages"]["cvxpy"] = "0.0.1"
    m["environment"]["packages"]["numpy"] = None
    (tree / "manifest.json").write_text(json.dumps(m, indent=2, sort_keys=True) + "\n")
    code = cli.main(["check", str(tree), "--cases", "3", "--seed", "2"])
    err = capsys.readouterr().err
    warnings = [line for line in err.splitlines() if "warning" in line]
    now = versions.installed()["packages"]
    assert warnings == [
        f"pdgc check: warning: tree {tree} was generated with cvxpy 0.0.1, "
        f"installed now: {now['cvxpy']}",
        f"pdgc check: warning: tree {tree} was generated with numpy not installed, "
        f"installed now: {now['numpy']}"], err
    assert code == 0          # a warning, not a failure

    code = cli.main(["check", str(small_tree), "--cases", "3", "--seed", "2"])
    assert "warning" not in capsys.readouterr().err and code == 0


def test_handoff_record_table_of_versions():
    now = versions.installed()
    md_rows = lambda blocks: [tuple(r) for r in blocks[1]["rows"]]  # noqa: E731
    same = H._version_blocks(now, now)
    assert "The two columns agree." in same[0]["text"]
    assert ("cvxpy", now["packages"]["cvxpy"], now["packages"]["cvxpy"]) in md_rows(same)
    assert ("Python", now["python"], now["python"]) in md_rows(same)
    old = json.loads(json.dumps(now))
    old["packages"]["scipy"] = "1.0.0"
    differ = H._version_blocks(old, now)
    assert "**They differ** (scipy)" in differ[0]["text"]
    assert ("scipy", "1.0.0", now["packages"]["scipy"]) in md_rows(differ)
    none = H._version_blocks(None, now)
    assert "records no versions" in none[0]["text"]
    assert ("numpy", "not recorded", now["packages"]["numpy"]) in md_rows(none)
