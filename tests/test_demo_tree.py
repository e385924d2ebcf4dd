"""The committed demo tree is what the generator makes today, byte for byte."""

import json

from codegen import versions
from codegen.backends import DEFAULT_BACKEND
from codegen.emit import generate, verify_tree
from conftest import DEMO_VEHICLE, ROOT

DEMO_TREE = ROOT / "generated" / "demo"


def test_demo_tree_is_committed_with_default_backend():
    m = verify_tree(DEMO_TREE)
    assert m["backend"] == DEFAULT_BACKEND
    assert (DEMO_TREE / "vehicle.toml").read_bytes() == DEMO_VEHICLE.read_bytes()


def test_demo_tree_regenerates_byte_for_byte(tmp_path):
    m = json.loads((DEMO_TREE / "manifest.json").read_text())
    out = tmp_path / "demo"
    generate(DEMO_VEHICLE, m["horizon"], out, backend=m["backend"], c_name=m["c_name"],
             precision=m["precision"])
    fresh = json.loads((out / "manifest.json").read_text())
    # The tree follows the installed versions (CVXPY's canonicalisation above
    # all): say which differ before comparing bytes (DEVELOPERS.md, "Pinned
    # dependencies": after `make lock-upgrade`, regenerate and explain the diff).
    assert versions.differences(m.get("environment"), fresh["environment"]) == [], \
        "generated/demo was made under other versions than those installed: " \
        "install the lock (make install) or regenerate it (make demo) and explain the diff"
    assert sorted(fresh["files"]) == sorted(m["files"])
    for rel in m["files"]:
        assert (out / rel).read_bytes() == (DEMO_TREE / rel).read_bytes(), rel
    assert (out / "manifest.json").read_bytes() == (DEMO_TREE / "manifest.json").read_bytes()
