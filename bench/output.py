"""The results: the Markdown table, latest.json and growth.png."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from bench.config import BACKENDS, LABELS, REFERENCE
from codegen.fsutil import write_atomic


def _t(x) -> str:
    """A time in engineering units."""
    if x is None or not isinstance(x, (int, float)) or not math.isfinite(x):
        return "-"
    if x >= 1.0:
        return f"{x:.2f} s"
    if x >= 1e-3:
        return f"{x * 1e3:.3g} ms"
    return f"{x * 1e6:.3g} us"


def _n(x, fmt="{:,.0f}") -> str:
    if x is None or not isinstance(x, (int, float)) or not math.isfinite(x):
        return "-"
    return fmt.format(x)


def _bytes(x) -> str:
    return _n(x)


def table_markdown(results: dict) -> str:
    rows = results["rows"]
    cfg = results["config"]
    meta = results["meta"]
    lines = ["# pdgc benchmark: latest run", "",
             f"Run {meta['date_utc']}, {meta['elapsed_s']:.0f} s, commit {meta['git_commit']}"
             + (" (with uncommitted changes in codegen/ or templates/)"
                if meta["codegen_or_templates_modified"] else "")
             + f"; {meta['cpus']} CPUs ({meta['cpu']}), {meta['cc']}; every backend, its "
             f"harness and the archive under cffi compiled with `{meta.get('cflags', '-O2')} "
             f"-fPIC` (PDGC_BENCH_CFLAGS; contraction is off unless the flags say "
             f"-ffp-contract=fast); "
             f"load average at start {meta['load_average_start'][0]}, at end "
             f"{meta['load_average_end'][0]} (a shared machine: read the ratios).", "",
             f"Horizons {', '.join(map(str, cfg['horizons']))}; {len(results['instances'])} "
             f"instances; fixed time of flight {cfg['time_of_flight_s']:g} s.", "",
             "## Solve time and accuracy (fixed time of flight)", "",
             "| N | backend | median | instructions (callgrind, nominal) | worst (p99) | x native | best | best x native | "
             "cffi call (overhead) | Python solve() | "
             "iterations med/max | rel. objective error | optimal | search median (solves) | "
             "search x native |",
             "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        cffi = (f"{_t(r.get('cffi_call_median_s'))} (+{_t(r.get('call_overhead_s'))})"
                if r["backend"] != REFERENCE else f"core {_t(r.get('core_median_s'))}")
        lines.append(
            f"| {r['horizon']} | {r['label']} | {_t(r['median_s'])} | "
            f"{_n(r.get('instructions')) if r.get('instructions') else '-'} | {_t(r['worst_s'])}"
            + (f" ({_t(r['p99_s'])})" if r.get("p99_s") else "") + " | "
            f"{_n(r['ratio_to_native'], '{:.2f}')} | {_t(r.get('best_s'))} | "
            f"{_n(r.get('best_ratio_to_native'), '{:.2f}')} | {cffi} | "
            f"{_t(r.get('py_solve_median_s'))} | "
            f"{_n(r['iterations_median'], '{:.0f}')}/{_n(r['iterations_max'], '{:.0f}')} | "
            f"{_n(r['rel_objective_error_max'], '{:.1e}')} | {r['target_met']}/{r['instances']} | "
            f"{_t(r['search_median_s'])} ({_n(r['search_solves_median'], '{:.0f}')}) | "
            f"{_n(r['search_ratio_to_native'], '{:.2f}')} |")
    lines += ["", "## Size, memory, build", "",
              "| N | backend | source bytes (solver + guidance) | machine code (text) | "
              "static RAM (data+bss) | workspace sizeof (header says) | heap peak (allocations: "
              "first call, per later call) | generation | compile |",
              "|---:|---|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        if r["backend"] == REFERENCE:
            continue
        lines.append(
            f"| {r['horizon']} | {r['label']} | {_bytes(r['source_bytes'])} "
            f"({_bytes(r['source_bytes_solver'])} + {_bytes(r['source_bytes_guidance'])}) | "
            f"{_bytes(r['text_bytes'])} | {_bytes(r['static_ram_bytes'])} | "
            f"{_bytes(r['workspace_bytes'])} ({_bytes(r.get('workspace_bytes_stated'))}) | "
            f"{_bytes(r.get('heap_peak_bytes'))} "
            f"({_n(r.get('heap_allocations_first_call'))}, "
            f"{_n(r.get('heap_allocations_per_call'), '{:.3g}')}) | "
            f"{r['generation_s']:.1f} s | {r['compile_s']:.1f} s |")
    lines += ["", "## Growth with the horizon (least squares on log-log)", "",
              "| backend | horizons | solve time ~ N^k, k | instructions ~ N^k, k | "
              "source bytes ~ N^k, k |",
              "|---|---|---:|---:|---:|"]
    for b, g in results["growth"].items():
        lines.append(f"| {LABELS[b]} | {', '.join(map(str, g['horizons']))} | "
                     f"{_n(g['time_exponent'], '{:.2f}')} | "
                     f"{_n(g.get('instructions_exponent'), '{:.2f}')} | "
                     f"{_n(g['source_exponent'], '{:.2f}')} |")
    ratios = headline_ratios(results)
    if ratios:
        lines += ["", "## Headline ratios (native time / other time, same run)", ""]
        for line in ratios:
            lines.append(f"- {line}")
    counted = [r for r in rows if r.get("instructions")]
    if counted:
        lines += ["", "## Instructions per call (valgrind callgrind: nominal instance, fixed time "
                  "of flight, inside <prefix>_plan_descent; independent of the machine's load)", "",
                  "| N | backend | instructions | x native |", "|---:|---|---:|---:|"]
        for r in counted:
            lines.append(f"| {r['horizon']} | {r['label']} | {_n(r['instructions'])} | "
                         f"{_n(r.get('instructions_ratio_to_native'), '{:.2f}')} |")
    if results.get("failures"):
        lines += ["", "## FAILED in this run", ""]
        lines += [f"- {k}: {v.splitlines()[0][:300]}" for k, v in results["failures"].items()]
    lines += ["", "## Notes", ""] + [f"- {x}" for x in results["notes"]]
    return "\n".join(lines) + "\n"


def headline_ratios(results: dict) -> list:
    """native/other per horizon, in wall time and (when counted) in instructions."""
    rows = results["rows"]
    by = {(r["backend"], r["horizon"]): r for r in rows}
    out = []
    for n in sorted({r["horizon"] for r in rows}):
        nat = by.get(("native", n))
        if nat is None:
            continue
        for b in ("cvxpygen-qoco", "cvxpygen-ecos", REFERENCE):
            o = by.get((b, n))
            if o is None or not (o["median_s"] > 0):
                continue
            line = (f"N={n}: native/{LABELS[b]} = {nat['median_s'] / o['median_s']:.3f} "
                    f"({LABELS[b]} takes {o['median_s'] / nat['median_s']:.2f}x the native time)")
            if o.get("best_s") and nat.get("best_s"):
                line += f"; best calls native/{LABELS[b]} = {nat['best_s'] / o['best_s']:.3f}"
            if o.get("instructions") and nat.get("instructions"):
                line += (f"; in instructions native/{LABELS[b]} = "
                         f"{nat['instructions'] / o['instructions']:.3f}")
            out.append(line)
        q = "cvxpygen-qoco"
        gq = results["growth"].get(q)
        if (q, n) in by or not gq:
            continue
        top = max(gq["horizons"])
        guesses = []
        for key, field_, what, mine in (("time_exponent", "median_s", "time", nat["median_s"]),
                                        ("instructions_exponent", "instructions", "instructions",
                                         nat.get("instructions"))):
            k = gq.get(key)
            base = by[(q, top)].get(field_)
            if k is None or not math.isfinite(k) or not base or not mine:
                continue
            guesses.append(f"{mine / (base * (n / top) ** k):.2f} from its {what} fit "
                           f"(k={k:.2f} over N={', '.join(map(str, gq['horizons']))})")
        if guesses:
            out.append(f"N={n}: native/{LABELS[q]} NOT MEASURED (QOCOGEN capped at N={top}); "
                       f"extrapolated, an estimate only: about " + "; ".join(guesses))
    return out


def plot_growth(results: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = results["rows"]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4.2))
    styles = {"native": "o-", "cvxpygen-ecos": "s-", "cvxpygen-qoco": "^-", REFERENCE: "d--"}
    for b in BACKENDS + (REFERENCE,):
        rs = sorted((r for r in rows if r["backend"] == b), key=lambda r: r["horizon"])
        if not rs:
            continue
        ns = [r["horizon"] for r in rs]
        k = results["growth"].get(b, {}).get("time_exponent", math.nan)
        lab = LABELS[b] + (f" (k={k:.2f})" if math.isfinite(k) else "")
        ax1.plot(ns, [r["median_s"] for r in rs], styles[b], label=lab)
        if b != REFERENCE:
            ks = results["growth"].get(b, {}).get("source_exponent", math.nan)
            ax2.plot(ns, [r["source_bytes"] for r in rs], styles[b],
                     label=LABELS[b] + (f" (k={ks:.2f})" if math.isfinite(ks) else ""))
    for ax, title, ylabel in ((ax1, "Solve time, fixed time of flight (median)", "seconds"),
                              (ax2, "Generated C source (solver + guidance)", "bytes")):
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("horizon N")
        ax.set_ylabel(ylabel)
        ax.set_title(title, fontsize=10)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8)
    fig.suptitle(f"pdgc bench {results['meta']['date_utc']} (shared machine: compare ratios)",
                 fontsize=9)
    fig.tight_layout()
    import io
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, metadata={"Software": None})
    plt.close(fig)
    write_atomic(path, buf.getvalue())


def _jsonable(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, (np.floating, np.integer)):
        return _jsonable(x.item())
    return x


def write_results(results: dict, out_dir: Path) -> dict:
    """latest.json, latest.md and growth.png in out_dir; returns their paths."""
    out_dir = Path(out_dir)
    paths = {"json": out_dir / "latest.json", "md": out_dir / "latest.md",
             "png": out_dir / "growth.png"}
    write_atomic(paths["json"], json.dumps(_jsonable(results), indent=2, sort_keys=True) + "\n")
    write_atomic(paths["md"], table_markdown(results))
    plot_growth(results, paths["png"])
    return paths
