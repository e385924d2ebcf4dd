"""The record's sections on the target checks."""

from __future__ import annotations

from codegen.verify.handoff.checks import Checks
from codegen.verify.handoff.record_blocks import _code, _table, _text, _yes
from codegen.verify.handoff.tools import (CPPCHECK_FLAGS, M7_DP_FLAGS, M7_SP_FLAGS, RELAXED_FLAGS,
                                          STRICT_FLAGS)


def _runner_rows(label, r):
    if r is None:
        return [(label, "not run", "-", "-")]
    w = r.get("worst", {})
    return [(label, _yes(r["passed"]),
             f"{r.get('passed_count')}/{r.get('vectors')} vectors",
             "; ".join(f"{k} {v:.3g}" for k, v in w.items()) +
             f"; arrays compared {r.get('arrays_compared')}, skipped {r.get('arrays_skipped')}")]


def _check_sections(ck: Checks, prefix: str) -> list:
    sec = []
    summary = []
    summary.append(("strict host build (all C files)",
                    _yes(all(p for _, p, _ in ck.strict)) if ck.strict else "not run",
                    f"{sum(p for _, p, _ in ck.strict)}/{len(ck.strict)} files pass `{STRICT_FLAGS}`"))
    if ck.cppcheck is not None:
        summary.append(("cppcheck", _yes(not ck.cppcheck["findings"]),
                        f"{len(ck.cppcheck['findings'])} findings"))
    for label, r in (("test vectors, host", ck.host), ("test vectors, arm-linux-gnueabihf under qemu-arm", ck.qemu)):
        if r is not None:
            summary.append((label, _yes(r["passed"]), f"{r.get('passed_count')}/{r.get('vectors')} pass"))
    if ck.cmake is not None:
        summary.append(("CMake build and ctest",
                        "not run" if ck.cmake["passed"] is None else _yes(ck.cmake["passed"]),
                        ck.cmake.get("skipped", "cmake -S . -B build-cmake; cmake --build; ctest")))
    for key, label in (("double", "Cortex-M7, double-precision FPU"),
                       ("single", "Cortex-M7, single-precision FPU")):
        m = ck.m7.get(key)
        if m is not None:
            t = (m.get("size") or {}).get("total") or {}
            strict_ok = all(x["strict"] for x in m.get("log", []))
            summary.append((label, _yes(m.get("built")),
                            f"text {t.get('text')} B, data {t.get('data')} B, bss {t.get('bss')} B; "
                            f"strict flags {'pass' if strict_ok else 'FAIL on some files'}"))
    if ck.coverage is not None:
        summary.append(("coverage (gcov)", _yes(ck.coverage["passed"]),
                        ", ".join(f"{c['file']} {c['percent']:.1f} %" for c in ck.coverage["files"])))
    for what, why in ck.not_run:
        summary.append((what, "NOT RUN", why))
    sec.append({"title": "Check results", "blocks": [
        _text("All checks ran on the package as shipped (a scratch copy), with its own "
              "Makefile targets where there is one (`make test`, `make test-qemu`, "
              "`make coverage`)."),
        _table(("check", "result", "detail"), summary)]})

    trows = [(t, v) for t, v in sorted(ck.tools.items())]
    flags = [("strict (all files unless listed below)", STRICT_FLAGS),
             ("host optimisation", "-O2"),
             ("Cortex-M7 double-precision FPU", f"{M7_DP_FLAGS} -O2 + strict flags"),
             ("Cortex-M7 single-precision FPU", f"{M7_SP_FLAGS} -O2 + strict flags"),
             ("arm-linux-gnueabihf", "-O2 + strict flags (the compiler's default armhf target)"),
             ("stack", "-fstack-usage -fcallgraph-info=su"),
             ("coverage", "-O0 -g --coverage"),
             ("cppcheck", CPPCHECK_FLAGS)]
    sec.append({"title": "Compilers and flags", "blocks": [
        _table(("tool", "version"), trows), _table(("build", "flags"), flags)]})

    srows = [(f, "pass" if p else "FAIL") for f, p, _ in ck.strict]
    blocks = [_text(f"Each C file compiled alone on the host with `{STRICT_FLAGS}`. "
                    "A file that fails is built with `" + RELAXED_FLAGS + "` in the package's "
                    "Makefile and CMake build, and is listed here with its diagnostics."),
              _table(("file", "strict flags"), srows)]
    for f, p, diag in ck.strict:
        if not p:
            blocks.append(_code(f"{f}:\n{diag}"))
    sec.append({"title": "Strict build", "blocks": blocks})

    if ck.cppcheck is not None:
        b = [_text(f"`cppcheck {CPPCHECK_FLAGS}` over src, solver, app and test: "
                   f"{len(ck.cppcheck['findings'])} findings.")]
        if ck.cppcheck["findings"]:
            b.append(_code("\n".join(ck.cppcheck["findings"])))
        sec.append({"title": "Static analysis", "blocks": b})

    if ck.cmake is not None and ck.cmake.get("tail"):
        sec[0]["blocks"].append(_code("CMake build failed:\n" + "\n".join(ck.cmake["tail"])))
    rrows = _runner_rows("host", ck.host) + _runner_rows("arm-linux-gnueabihf, qemu-arm", ck.qemu)
    blocks = [_text("The runner replays every vector through "
                    f"`{prefix}_plan_descent()` and checks every output; worst errors seen:"),
              _table(("platform", "result", "vectors", "worst errors"), rrows)]
    for label, r in (("host", ck.host), ("qemu-arm", ck.qemu)):
        if r is not None and r["failures"]:
            blocks.append(_code(f"{label} failures:\n" + "\n".join(r["failures"])))
    sec.append({"title": "Test-vector results", "blocks": blocks})

    for key, label in (("double", "double-precision FPU"), ("single", "single-precision FPU")):
        m = ck.m7.get(key)
        if m is None:
            continue
        blocks = [_text(f"Library objects of the guidance layer and solver, built with "
                        f"`arm-none-eabi-gcc {m['flags']} -O2`"
                        + (f" from a companion tree (`{m['tree']}`)" if m.get("tree") else "")
                        + ". A build and size check: nothing runs on this target here"
                        + ("; the test vectors replay the double-precision build only."
                           if m.get("tree", "").startswith("pdgc") else ".") )]
        if not m.get("built"):
            blocks.append(_text("**Build failed.**"))
            blocks += [_code(f"{x['file']}:\n{x['diagnostics']}") for x in m.get("log", [])]
            sec.append({"title": f"Cortex-M7, {label}", "blocks": blocks})
            continue
        size = m["size"]
        rows = [(o["object"], o["text"], o["data"], o["bss"]) for o in size["objects"]]
        t = size["total"] or {}
        rows.append(("total", t.get("text"), t.get("data"), t.get("bss")))
        blocks.append(_table(("object", "text [B]", "data [B]", "bss [B]"), rows))
        sz = m.get("sizeof", {})
        static_lib = (t.get("data") or 0) + (t.get("bss") or 0)
        blocks.append(_text(
            f"Static RAM: the library itself holds {static_lib} B (data + bss). All working "
            f"memory is caller-owned: `sizeof({prefix}_workspace)` = {sz.get('workspace')} B and "
            f"`sizeof({prefix}_plan)` = {sz.get('plan')} B on this target (from the symbol sizes "
            f"of a probe object), so a caller that places one of each in static memory needs "
            f"{static_lib + (sz.get('workspace') or 0) + (sz.get('plan') or 0)} B in all."))
        st = m["stack"]
        if "error" in st:
            blocks.append(_text(f"Stack: {st['error']}"))
        else:
            path = " -> ".join(f"{f} ({b} B)" for f, b in st["path"])
            blocks.append(_text(
                f"Worst stack depth from `{st['entry']}`: **{st['bytes']} B**, the largest sum of "
                f"frames along any call path of the call graph from -fcallgraph-info=su (no "
                f"recursion: the graph is acyclic{'' if not st['cycle'] else '; CYCLE FOUND: ' + ', '.join(st['cycle'])}). "
                f"Deepest path: {path}. Calls into the C and compiler run-time libraries ("
                f"{', '.join(st['external']) or 'none'}) are counted as 0 B: add the target "
                f"libraries' own figures. Frames that are not static: "
                f"{', '.join(st['not_static']) or 'none'}."))
        blocks.append(_table(("function", "frame [B]", "kind"), m["frames"]))
        nonstrict = [x["file"] for x in m["log"] if not x["strict"]]
        if nonstrict:
            blocks.append(_text("Files that failed the strict flags on this target (built relaxed "
                                "to measure them): " + ", ".join(nonstrict)))
            blocks += [_code(f"{x['file']}:\n{x['diagnostics']}") for x in m["log"] if not x["strict"]]
        if m.get("soft_double"):
            blocks.append(_text(
                "Double-precision operations in software (undefined `__aeabi_d*` helpers "
                "in the library): " + ", ".join(f"`{s}`" for s in m["soft_double"]) +
                ". On a single-precision FPU the guidance layer's double arithmetic "
                "(parameters, search, SI conversion) is emulated; the solver runs in float."
                if key == "single" else
                "Software double-precision helpers referenced: " +
                ", ".join(f"`{s}`" for s in m["soft_double"]) + "."))
        sec.append({"title": f"Cortex-M7, {label}", "blocks": blocks})

    if ck.coverage is not None:
        rows = [(c["file"], c["lines"], c["executed"], f"{c['percent']:.2f} %")
                for c in ck.coverage["files"]]
        lines = sum(c["lines"] for c in ck.coverage["files"])
        done = sum(c["executed"] for c in ck.coverage["files"])
        if lines:
            rows.append(("all library sources", lines, done, f"{100.0 * done / lines:.2f} %"))
        b = [_text("Statement (line) coverage of the library sources by the test vectors: "
                   "`make coverage` (gcc -O0 --coverage, `gcov -n`)."),
             _table(("file", "lines", "executed", "coverage"), rows)]
        if not ck.coverage["passed"]:
            b.append(_code("\n".join(ck.coverage.get("tail", []))))
        sec.append({"title": "Coverage", "blocks": b})
    return sec
