"""Reading the tools' output: the test runner, size, the call graph, gcov."""

from __future__ import annotations

import re


def _parse_runner(out: str) -> dict:
    res = {"vectors": None, "passed_count": None, "failed_count": None, "worst": {},
           "arrays_compared": None, "arrays_skipped": None,
           "failures": [ln.strip() for ln in out.splitlines() if ln.startswith("FAIL")]}
    m = re.search(r"^SUMMARY vectors (\d+) passed (\d+) failed (\d+)", out, re.M)
    if m:
        res["vectors"], res["passed_count"], res["failed_count"] = map(int, m.groups())
    m = re.search(r"^WORST (.*)$", out, re.M)
    if m:
        parts = m.group(1).split()
        res["worst"] = {parts[i]: float(parts[i + 1]) for i in range(0, len(parts) - 1, 2)}
    m = re.search(r"^ARRAYS compared (\d+) skipped (\d+)", out, re.M)
    if m:
        res["arrays_compared"], res["arrays_skipped"] = map(int, m.groups())
    return res


def _runner_result(code: int, out: str, expected: int) -> dict:
    res = _parse_runner(out)
    res["exit_code"] = code
    res["passed"] = (code == 0 and res["vectors"] == expected and res["failed_count"] == 0)
    if not res["passed"] and res["vectors"] is None:
        res["failures"] = res["failures"] or [ln for ln in out.strip().splitlines()[-8:]]
    return res


def _parse_size(out: str) -> dict:
    """arm-none-eabi-size (Berkeley format) of an archive: per object and total."""
    rows, total = [], None
    for ln in out.splitlines():
        parts = ln.split()
        if len(parts) >= 6 and parts[0].isdigit():
            text, data, bss = int(parts[0]), int(parts[1]), int(parts[2])
            name = parts[5]
            if name == "(TOTALS)":
                total = {"text": text, "data": data, "bss": bss}
            else:
                rows.append({"object": re.sub(r" \(ex .*\)$", "", name).split("/")[-1],
                             "text": text, "data": data, "bss": bss})
    if total is None and rows:
        total = {k: sum(r[k] for r in rows) for k in ("text", "data", "bss")}
    return {"objects": rows, "total": total}


_CI_NODE = re.compile(r'node:\s*\{\s*title:\s*"([^"]+)"\s*label:\s*"([^"]*)"')
_CI_EDGE = re.compile(r'edge:\s*\{\s*sourcename:\s*"([^"]+)"\s*targetname:\s*"([^"]+)"')


def worst_stack(ci_texts, entry: str) -> dict:
    """Worst stack depth from ``entry`` over the call graph of -fcallgraph-info=su.

    Each node's frame comes from its label ("N bytes (static)"); functions
    with no frame in the graph (library calls: sqrt, log, ...) count 0 and are
    listed. The graph has no cycles (the generated code has no recursion); a
    cycle is reported as an error rather than followed.
    """
    frames, kinds, edges = {}, {}, {}
    for text in ci_texts:
        for title, label in _CI_NODE.findall(text):
            m = re.search(r"(\d+) bytes \(([^)]*)\)", label.replace("\\n", "\n"))
            if m:
                frames[title] = int(m.group(1))
                kinds[title] = m.group(2)
            else:
                frames.setdefault(title, None)
        for a, b in _CI_EDGE.findall(text):
            edges.setdefault(a, set()).add(b)
    if entry not in frames:
        return {"entry": entry, "error": f"{entry} not found in the call graph"}
    memo, on_path, external = {}, set(), set()
    cycle = []

    def depth(f):
        if f in memo:
            return memo[f]
        if f in on_path:
            cycle.append(f)
            return 0, [f]
        on_path.add(f)
        own = frames.get(f)
        if own is None:
            external.add(f)
            own = 0
        best, path = 0, []
        for g in sorted(edges.get(f, ())):
            d, p = depth(g)
            if d > best:
                best, path = d, p
        on_path.discard(f)
        memo[f] = (own + best, [f] + path)
        return memo[f]

    total, path = depth(entry)
    dynamic = sorted(f for f in memo if kinds.get(f, "static") not in ("static",))
    return {"entry": entry, "bytes": total, "path": [(f, frames.get(f) or 0) for f in path],
            "external": sorted(external), "cycle": sorted(set(cycle)),
            "not_static": dynamic}


def _parse_gcov(out: str) -> list:
    rows, current = [], None
    for ln in out.splitlines():
        m = re.match(r"^File '(.+)'$", ln.strip())
        if m:
            current = m.group(1)
            continue
        m = re.match(r"^Lines executed:([\d.]+)% of (\d+)", ln.strip())
        if m and current is not None:
            if not current.startswith("/"):
                pct, total = float(m.group(1)), int(m.group(2))
                rows.append({"file": current, "percent": pct, "lines": total,
                             "executed": round(pct * total / 100.0)})
            current = None
    return rows
