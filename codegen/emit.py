"""Render a self-contained C tree for one vehicle, horizon and backend.

The tree (see templates/README.md.j2) holds the backend's solver sources, the
guidance layer rendered from templates/, build files, a program that plans once
(app/), a
README for this vehicle, a copy of the vehicle file and manifest.json with
the hash of every file. Output is deterministic: the same inputs give the
same bytes (no timestamps, no absolute paths), and the tree is written
beside its destination and swapped in, so an interrupted run leaves either
the old tree or the new one, never half of one.
"""

from __future__ import annotations

import hashlib
import json
import keyword
import math
import re
import shutil
import tempfile
import time
from pathlib import Path

import jinja2

from codegen import __version__, versions
from codegen.model import policy, problem, tofsearch, verdict
from codegen.backends import DEFAULT_BACKEND, get_backend
from codegen.backends.native import ITERATIONS_HARD_LIMIT
from codegen.model.canonical import extract
from codegen.errors import InputError
from codegen.fsutil import TEMPLATES_DIR, swap_in_directory
from codegen.model.problem import MASS_FLOOR_FRACTION, DescentProblem
from codegen.model.vehicle import DEMO_VEHICLE_NAME, VEHICLE_KEYS, load_vehicle

TEMPLATES = TEMPLATES_DIR
#: Default of --c-name, the prefix of every C identifier and file name of a tree.
DEFAULT_C_NAME = "pdg"
#: Default of {c}_guidance_config.iterations_per_solve_max; its largest value is the
#: native solver core's compile-time ITERATIONS_HARD_LIMIT, for every backend.
DEFAULT_ITERATIONS_PER_SOLVE = 100
_C_KEYWORDS = {"auto", "break", "case", "char", "const", "continue", "default", "do", "double",
               "else", "enum", "extern", "float", "for", "goto", "if", "inline", "int", "long",
               "register", "restrict", "return", "short", "signed", "sizeof", "static", "struct",
               "switch", "typedef", "union", "unsigned", "void", "volatile", "while", "_Bool",
               "_Complex", "_Imaginary"}


def c_literal(x) -> str:
    """Exact C literal of a double: Python's repr round-trips."""
    if isinstance(x, bool):
        raise TypeError("bool is not a C number")
    v = float(x)
    if not math.isfinite(v):
        raise ValueError(f"{x!r} cannot be rendered as a finite C literal")
    r = repr(v)
    if not any(ch in r for ch in ".en"):
        r += ".0"
    return r


def check_c_name(c_name: str) -> str:
    if not isinstance(c_name, str) or not re.fullmatch(r"[a-z][a-z0-9_]{0,15}", c_name):
        raise InputError("--c-name", c_name,
                         "must be a lower-case C identifier: a letter, then up to 15 "
                         "lower-case letters, digits or _")
    if c_name in _C_KEYWORDS or keyword.iskeyword(c_name):
        raise InputError("--c-name", c_name, "must not be a C keyword")
    if c_name.lower().startswith("cpg"):
        raise InputError("--c-name", c_name, "must not start with 'cpg' (used by cvxpygen's code)")
    return c_name


def environment() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)),
                             undefined=jinja2.StrictUndefined, keep_trailing_newline=True,
                             autoescape=False)
    env.filters["c"] = c_literal
    env.globals["demo_vehicle_name"] = DEMO_VEHICLE_NAME     # for templates/caution.j2
    return env


def _error_weights_si(vehicle) -> list:
    """Weights of the terminal error per component of (r_N - target,
    v_N - v_target): problem.terminal_error_weights in SI."""
    td = vehicle.touchdown
    return [1.0 / td.error_position_scale_m] * 3 + [1.0 / td.speed_horizontal_max_mps] * 2 + \
        [1.0 / td.speed_vertical_max_mps]


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def generate(vehicle_path, horizon: int, out_dir, backend: str = DEFAULT_BACKEND,
             c_name: str = DEFAULT_C_NAME, precision: str = "double", progress=None) -> dict:
    """Generate the tree; returns the manifest (as a dict). ``c_name`` prefixes
    every C identifier and file name of the tree (``--c-name``)."""
    say = progress or (lambda msg: None)
    prefix = check_c_name(c_name)
    if precision not in ("double", "single"):
        raise InputError("--precision", precision, "must be 'double' or 'single'")
    if not isinstance(horizon, int) or horizon < 2 or horizon > 1000:
        raise InputError("--horizon", horizon, "must be an integer from 2 to 1000")
    vehicle_path = Path(vehicle_path)
    vehicle = load_vehicle(vehicle_path)
    if vehicle.booster is not None:
        # The generated C solves the lander's program only (issue 19, item 4
        # is the booster's); a tree that silently dropped the drag, the
        # thrust-rate limit or the final approach would plan another vehicle.
        raise InputError(str(vehicle_path), "[drag], [atmosphere], [final_approach] or "
                         "thrust_rate_max_nps",
                         "booster additions are planned by the reference only (pdgc solve); "
                         "the generated C does not model them yet")
    vehicle_bytes = vehicle_path.read_bytes()
    be = get_backend(backend)
    if precision != "double" and backend != "native":
        raise InputError("--precision", precision, f"backend {backend} supports double only")

    t0 = time.perf_counter()
    say(f"building the descent problem (N = {horizon})")
    dp = DescentProblem(vehicle, horizon)
    prog = extract(dp)
    env = environment()
    n = horizon
    ctx = {
        "prefix": prefix, "PREFIX": prefix.upper(), "version": __version__,
        "vehicle": vehicle, "vehicle_sha256": vehicle.source_sha256, "N": n,
        "backend": backend, "precision": precision, "s": dp.scaling, "k": dp.constants,
        "mass_floor_fraction": MASS_FLOOR_FRACTION,
        "grid_points": tofsearch.GRID_POINTS, "brent_max_steps": tofsearch.BRENT_MAX_STEPS,
        "golden_step": tofsearch.GOLDEN_STEP,
        "retry_budget": tofsearch.RETRY_BUDGET, "retry_shift": tofsearch.RETRY_SHIFT,
        "tof_tolerance": tofsearch.TOLERANCE_S, "layout": dp.parameter_layout,
        "nparam": sum(size for _, _, size in dp.parameter_layout),
        "cos_cant": math.cos(math.radians(vehicle.engine_cant_deg)),
        "full_throttle_n": vehicle.thrust_max_n * math.cos(math.radians(vehicle.engine_cant_deg)),
        "error_weights_si": [c_literal(w) for w in _error_weights_si(vehicle)],
        "merit_error_weight": problem.MERIT_ERROR_WEIGHT,
        "least_error_fuel_weight": problem.LEAST_ERROR_FUEL_WEIGHT,
        "error_bound_free": problem.ERROR_BOUND_FREE,
        "error_slack_rel": policy.ERROR_SLACK_REL, "error_slack_abs": policy.ERROR_SLACK_ABS,
        "nearby_tof_steps": policy.NEARBY_TOF_STEPS,
        "merit_meets_target": policy.MERIT_MEETS_TARGET,
        "reserve_steps_default": policy.RESERVE_STEPS,
        "reserve_steps_max": policy.RESERVE_STEPS_MAX,
        "probe_tolerance": policy.PROBE_TOLERANCE if precision == "double" else None,
        "checks": verdict.CHECKS, "tolerances": verdict.TOLERANCES[precision],
        "tan_glide_slope": math.tan(math.radians(vehicle.glide_slope_deg)),
        "deg_per_rad": 180.0 / math.pi,
        "default_iterations_per_solve": DEFAULT_ITERATIONS_PER_SOLVE,
        "iterations_per_solve_limit": ITERATIONS_HARD_LIMIT,
    }

    def render(name, context):
        return env.get_template(name).render(**context)

    say(f"generating the {backend} solver")
    out = be.generate(dp, dict(ctx, prog=prog), render)
    ctx["reentrant"] = out.reentrant
    ctx["heap_free"] = out.heap_free

    env_ = vehicle.envelope
    mid = lambda lo, hi: [c_literal((a + b) / 2.0) for a, b in zip(lo, hi)]  # noqa: E731
    solution = 8 * (3 * (n + 1) * 2 + (n + 1) + 3 * n + n + 4) + 4 * 2
    ws_bytes = (out.backend_bytes + 8 * ctx["nparam"] + 4 * solution + 4 * 9
                + 8 * (2 * ctx["grid_points"] + 3))
    plan_bytes = (4 + 8 * 4 + 4 * 6 + 8 * (2 + 7 + len(verdict.CHECKS)) + 4
                  + 8 * ((n + 1) * 8 + n * 7))
    ctx.update({
        "mid_position": mid(env_.position_min_m, env_.position_max_m),
        "mid_velocity": mid(env_.velocity_min_mps, env_.velocity_max_mps),
        "mid_mass": c_literal((env_.mass_min_kg + env_.mass_max_kg) / 2.0),
        "print_every": max(1, n // 10),
        "backend_header": out.backend_header, "backend_fields": out.backend_fields,
        "workspace_bytes": ws_bytes, "plan_bytes": plan_bytes,
        "max_probes": tofsearch.max_evaluations(),
        "final_solves": policy.FINAL_SOLVES_SEARCH,
        "max_solves_search": tofsearch.max_evaluations() + policy.FINAL_SOLVES_SEARCH,
        "max_solves_fixed_expr": f"{policy.FINAL_SOLVES_FIXED} + reserve_steps",
        "max_solves_fixed": policy.FINAL_SOLVES_FIXED + policy.RESERVE_STEPS_MAX,
        "sizes": {"n": int(prog.n), "p": int(prog.p), "m": int(prog.m), "nonneg": int(prog.nonneg),
                  "soc": len(prog.soc)},
        "vehicle_rows": [(k, c_literal(getattr(vehicle, k)) if k != "name" else vehicle.name)
                         for k in VEHICLE_KEYS],
        "backend_note": out.info.get("note", f"{out.info.get('solver', backend)} "
                                             f"(generated by {out.info.get('generator', 'pdgc')})"),
        "solver_settings": out.info.get("settings_rows", []),
        "solver_statuses": out.info.get("status_rows", []),
        "solver_causes": out.info.get("cause_rows", []),
    })

    guidance_sources = [f"src/{prefix}_guidance.c", f"src/{prefix}_verdict.c",
                        f"src/{prefix}_backend.c"]
    include_dirs = ["include"] + out.include_dirs
    objects = []
    for src in guidance_sources + out.solver_sources:
        strict = src in guidance_sources or out.solver_strict
        obj = "build/obj/" + src.replace("/", "__")[:-2] + ".o"
        objects.append((src, obj, strict))
    build_ctx = dict(ctx, objects=objects, include_dirs=include_dirs, defines=out.defines,
                     solver_flags="-std=c99 -Wall -Wextra -Werror" if out.solver_strict else "",
                     solver_strict=out.solver_strict)

    files = dict(out.files)
    files[f"include/{prefix}_guidance.h"] = render("guidance.h.j2", ctx).encode()
    files[f"include/{prefix}_backend.h"] = render("backend.h.j2", ctx).encode()
    files[f"include/{prefix}_verdict.h"] = render("verdict.h.j2", ctx).encode()
    files[f"src/{prefix}_guidance.c"] = render("guidance.c.j2", ctx).encode()
    files[f"src/{prefix}_verdict.c"] = render("verdict.c.j2", ctx).encode()
    files[f"src/{prefix}_backend.c"] = out.adapter_c.encode()
    files[f"app/{prefix}_plan_once.c"] = render("plan_once.c.j2", ctx).encode()
    files["Makefile"] = render("Makefile.j2", build_ctx).encode()
    files["CMakeLists.txt"] = render("CMakeLists.txt.j2", build_ctx).encode()
    files["README.md"] = render("README.md.j2", ctx).encode()
    files["vehicle.toml"] = vehicle_bytes

    manifest = {
        "tool": "pdgc",
        "version": __version__,
        "backend": backend,
        "horizon": n,
        "c_name": prefix,
        "precision": precision,
        "vehicle": {"file": "vehicle.toml", "name": vehicle.name,
                    "sha256": vehicle.source_sha256},
        "options": {"iterations_per_solve_max_default": DEFAULT_ITERATIONS_PER_SOLVE,
                    "iterations_per_solve_max_limit": ITERATIONS_HARD_LIMIT,
                    "tof_tolerance_s": tofsearch.TOLERANCE_S,
                    "solves_per_call_max_search": ctx["max_solves_search"],
                    "solves_per_call_max_fixed": ctx["max_solves_fixed"]},
        "build": {"guidance_sources": guidance_sources, "solver_sources": out.solver_sources,
                  "include_dirs": include_dirs, "defines": out.defines,
                  "solver_strict": out.solver_strict},
        "reentrant": out.reentrant,
        "heap_free": out.heap_free,
        "problem": ctx["sizes"] | {"nparam": ctx["nparam"]},
        "environment": versions.installed(),
        "files": {path: _sha256(data) for path, data in sorted(files.items())},
    }
    files["manifest.json"] = (json.dumps(manifest, indent=2, sort_keys=True) + "\n").encode()
    say(f"writing {len(files)} files to {out_dir}")
    write_tree(Path(out_dir), files)
    manifest["generation_seconds"] = time.perf_counter() - t0
    return manifest


def write_tree(out_dir: Path, files: dict) -> None:
    """Write all files into a fresh directory beside out_dir, then swap it in."""
    out_dir = out_dir.resolve()
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    if out_dir.exists() and not (out_dir / "manifest.json").exists() and any(out_dir.iterdir()):
        raise InputError("--out", str(out_dir),
                         "exists, is not empty and holds no pdgc tree (manifest.json): "
                         "refusing to replace it")
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    try:
        for rel, data in files.items():
            path = tmp / rel
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(data)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    swap_in_directory(tmp, out_dir)


def read_manifest(tree_dir) -> dict:
    path = Path(tree_dir) / "manifest.json"
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError("DIR", str(tree_dir), "holds no manifest.json: not a pdgc tree") from None
    except json.JSONDecodeError as exc:
        raise InputError("manifest.json", str(path), f"is not valid JSON: {exc}") from None


def verify_tree(tree_dir) -> dict:
    """Check every file of the tree against the manifest's hashes."""
    tree_dir = Path(tree_dir)
    manifest = read_manifest(tree_dir)
    for rel, digest in manifest["files"].items():
        try:
            data = (tree_dir / rel).read_bytes()
        except FileNotFoundError:
            raise InputError(rel, str(tree_dir / rel), "is listed in manifest.json but missing") from None
        if _sha256(data) != digest:
            raise InputError(rel, str(tree_dir / rel),
                             "does not match its sha256 in manifest.json (edited after generation?)")
    return manifest
