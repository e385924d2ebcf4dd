"""The pictures of the envelope report (matplotlib, as data URIs)."""

from __future__ import annotations

import math


STATUS_COLOURS = {"target_met": "#2a7f2a", "best_reachable": "#e08a00", "unreachable": "#c02020",
                  "iterations_exhausted": "#7a1fa2", "solver_breakdown": "#1f5fbf", "input_refused": "#555555"}


#: Below this many cases a histogram counts on a linear axis with integer
#: ticks: a log axis over counts of 1 to 5 showed one tick or none.
FEW_SAMPLES = 30


def count_axis(ax, counts_max: int, log: bool) -> None:
    """The y axis of a histogram: log with plain numbers when there are many
    cases, else linear with integer ticks."""
    import matplotlib.ticker
    if log:
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(matplotlib.ticker.ScalarFormatter())
        ax.yaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
    else:
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True, min_n_ticks=2))
        ax.set_ylim(0, max(1, counts_max) + 0.5)


def figures(records, cap=None, call_bound=None, envelope=None) -> dict:
    """The report's pictures, as data URIs. ``envelope``: the vehicle's
    [envelope], drawn as a box on the feasibility map."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker
    import numpy as np

    from codegen.plot import figure_png_base64

    figs = {}
    gens = [r["generated"] for r in records]
    statuses = np.array([g["status"] for g in gens])
    it_max = np.array([g["iterations_max"] for g in gens])
    it_tot = np.array([g["iterations_total"] for g in gens])

    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    for ax, data, label, bound, bound_label in (
            (axes[0], it_max, "most iterations in one solve", cap, "per-solve cap"),
            (axes[1], it_tot, "iterations of the whole call", call_bound,
             "call bound (cap x worst-case solves)")):
        lo, hi = int(data.min()), int(data.max())
        step = max(1, (hi - lo + 1) // 60)
        bins = np.arange(lo, hi + step + 1, step) - 0.5
        counts, _, _ = ax.hist(data, bins=bins, color="#3b6ea5")
        ax.set_xlabel(label)
        ax.set_ylabel("cases")
        count_axis(ax, int(counts.max()), len(data) >= FEW_SAMPLES)
        ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        ax.axvline(hi, color="#c02020", lw=1, ls="--", label=f"worst {hi}")
        if bound:
            ax.axvline(bound, color="#202020", lw=1.2, label=f"{bound_label} {bound}")
        ax.legend(fontsize=8)
    figs["iterations"] = figure_png_base64(fig)

    t_ms = np.array([g["solve_time_s"] for g in gens]) * 1e3
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    pos = t_ms[t_ms > 0]
    # A log time axis needs a decade of spread and enough cases to fill it;
    # otherwise (a few cases, or all alike) linear axes with plain ticks.
    wide = len(pos) >= FEW_SAMPLES and pos.max() > 10.0 * pos.min()
    if len(pos):
        if wide:
            bins = np.logspace(math.log10(pos.min()), math.log10(pos.max()) + 1e-9, 50)
        else:
            bins = min(50, max(5, len(pos)))
        counts, _, _ = axes[0].hist(pos, bins=bins, color="#3b6ea5")
        count_axis(axes[0], int(counts.max()), wide)
        srt = np.sort(pos)
        surv = 1.0 - np.arange(len(srt)) / len(srt)
        axes[1].step(srt, surv, where="post", color="#3b6ea5")
        if wide:
            axes[1].set_yscale("log")
    for ax in axes:
        if wide:
            ax.set_xscale("log")
            ax.xaxis.set_major_locator(matplotlib.ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
            ax.xaxis.set_major_formatter(matplotlib.ticker.FormatStrFormatter("%g"))
            ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
        else:
            ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(5, min_n_ticks=2))
    axes[0].set_xlabel("solve time [ms] (whole search)")
    axes[0].set_ylabel("cases")
    axes[1].set_xlabel("solve time [ms]")
    axes[1].set_ylabel("fraction of cases slower or equal")
    figs["solve_time"] = figure_png_base64(fig)

    x = np.array([r["inputs"]["position_m"][0] for r in records])
    y = np.array([r["inputs"]["position_m"][1] for r in records])
    up = np.array([r["inputs"]["position_m"][2] for r in records])
    fig, ax = plt.subplots(figsize=(8, 5))
    size = 12 if len(records) < 2000 else 4
    for st in sorted(set(statuses), key=lambda s: (s != "target_met", s)):
        sel = statuses == st
        ax.scatter(x[sel], up[sel], s=size, c=STATUS_COLOURS.get(st, "#000"),
                   label=f"{st} ({int(sel.sum())})", alpha=0.8, linewidths=0)
    if envelope is not None:
        from matplotlib.patches import Rectangle
        x0, x1 = envelope.position_min_m[0], envelope.position_max_m[0]
        z0, z1 = envelope.position_min_m[2], envelope.position_max_m[2]
        ax.add_patch(Rectangle((x0, z0), x1 - x0, z1 - z0, fill=False, ec="#202020", lw=1.2,
                               ls="--", label="vehicle [envelope]"))
        ax.update_datalim([(x0, z0), (x1, z1)])
        ax.autoscale_view()
    ax.set_xlabel("initial downrange x [m] (from the target)")
    ax.set_ylabel("initial altitude [m] (above the target)")
    ax.legend(fontsize=8, markerscale=2)
    figs["feasibility"] = figure_png_base64(fig)

    divert = np.hypot(x, y)
    fuel = np.array([g["fuel_kg"] if g["fuel_kg"] is not None else np.nan for g in gens])
    fig, ax = plt.subplots(figsize=(8, 5))
    for st in sorted(set(statuses), key=lambda s: (s != "target_met", s)):
        sel = (statuses == st) & np.isfinite(fuel)
        if sel.any():
            ax.scatter(divert[sel], fuel[sel], s=size, c=STATUS_COLOURS.get(st, "#000"),
                       label=f"{st} ({int(sel.sum())})", alpha=0.8, linewidths=0)
    ax.set_xlabel("divert distance: initial horizontal distance to the target [m]")
    ax.set_ylabel("fuel [kg]")
    if np.isfinite(fuel).any():
        ax.legend(fontsize=8, markerscale=2)
    figs["fuel_divert"] = figure_png_base64(fig)

    rel = [abs(r["accuracy"]["fuel_rel_diff"]) for r in records
           if r["accuracy"] and r["accuracy"]["fuel_rel_diff"] is not None]
    if rel and max(rel) > 0.0:
        fig, ax = plt.subplots(figsize=(8, 3.4))
        floor = 1e-16
        vals = np.maximum(np.array(rel), floor)
        bins = np.logspace(math.log10(vals.min()), math.log10(vals.max()) + 1e-9, 40)
        ax.hist(vals, bins=bins, color="#3b6ea5")
        ax.set_xscale("log")
        ax.set_xlabel(f"|fuel generated - fuel reference| / fuel reference (floored at {floor:g})")
        ax.set_ylabel("cases")
        figs["accuracy"] = figure_png_base64(fig)
    return figs
