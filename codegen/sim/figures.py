"""The pictures of the simulation report (matplotlib, as data URIs)."""

from __future__ import annotations

import math

import numpy as np

from codegen.model.vehicle import Vehicle
from codegen.sim.loop import CRASHED, LANDED, OUT_OF_LIMITS, TOUCHED_DOWN


def figures(records, vehicle: Vehicle, target_m, requirements=None) -> list:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from codegen.plot import figure_png_base64

    landed = [r for r in records if r["status"] in TOUCHED_DOWN]
    tx, ty = target_m[0], target_m[1]
    figs = []

    fig, ax = plt.subplots(1, 3, figsize=(16, 5))
    tan_gs = math.tan(math.radians(vehicle.glide_slope_deg))
    span = 1.0
    for r in landed:
        p = np.asarray(r["history"]["position_m"], float)
        horiz = np.hypot(p[:, 0] - tx, p[:, 1] - ty)
        span = max(span, float(horiz.max()))
        ax[0].plot(horiz, p[:, 2] - target_m[2], lw=0.6, alpha=0.4, color="tab:blue")
        ax[1].plot(p[:, 0] - tx, p[:, 1] - ty, lw=0.6, alpha=0.4, color="tab:blue")
        ax[2].plot(horiz, p[:, 2] - target_m[2], lw=0.6, alpha=0.4, color="tab:blue")
    hs = np.linspace(0.0, span * 1.05, 50)
    ax[0].fill_between(hs, 0.0, hs * tan_gs, color="tab:red", alpha=0.2, label="outside glide slope")
    ax[0].set_xlabel("horizontal distance to target [m]")
    ax[0].set_ylabel("altitude above target [m]")
    ax[0].set_title(f"side view, {len(landed)} runs")
    ax[0].legend()
    ax[1].plot([0], [0], "kx", ms=10, label="target")
    ax[1].set_xlabel("x [m]")
    ax[1].set_ylabel("y [m]")
    ax[1].set_title("ground track")
    ax[1].legend()
    ax[2].set_xlim(0.0, 30.0)
    ax[2].set_ylim(-0.5, 30.0)
    ax[2].set_xlabel("horizontal distance to target [m]")
    ax[2].set_ylabel("altitude above target [m]")
    ax[2].set_title("last 30 m (history sampled every 0.5 s)")
    figs.append(("Trajectory fan", figure_png_base64(fig)))

    fig, ax = plt.subplots(1, 2, figsize=(13, 5))
    for status, colour in ((LANDED, "tab:green"), (OUT_OF_LIMITS, "tab:orange"),
                           (CRASHED, "tab:red")):
        group = [r for r in landed if r["status"] == status]
        if not group:
            continue
        p = np.asarray([r["touchdown_position_m"] for r in group], float)
        ax[0].scatter(p[:, 0] - tx, p[:, 1] - ty, s=8, alpha=0.6, color=colour,
                      label=f"{status} ({len(group)})")
        v = np.asarray([[r["horizontal_speed_mps"], r["vertical_speed_mps"]] for r in group], float)
        ax[1].scatter(v[:, 0], v[:, 1], s=8, alpha=0.6, color=colour, label=f"{status} ({len(group)})")
    if requirements:
        circle = np.linspace(0.0, 2.0 * math.pi, 200)
        ax[0].plot(requirements["miss_max_m"] * np.cos(circle),
                   requirements["miss_max_m"] * np.sin(circle), "k--", lw=0.8,
                   label=f"miss limit {requirements['miss_max_m']:g} m")
        h, vv = requirements["speed_horizontal_max_mps"], requirements["speed_vertical_max_mps"]
        ax[1].plot([0.0, h, h], [vv, vv, 0.0], "k--", lw=0.8, label="speed limits")
        ax[1].legend()
    ax[0].plot([0], [0], "kx", ms=10, label="target")
    ax[0].set_xlabel("x miss [m]")
    ax[0].set_ylabel("y miss [m]")
    ax[0].set_title("touchdown position")
    ax[0].axis("equal")
    ax[0].legend()
    ax[1].set_xlabel("horizontal speed at touchdown [m/s]")
    ax[1].set_ylabel("downward speed at touchdown [m/s]")
    ax[1].set_title("touchdown velocity")
    figs.append(("Touchdown scatter", figure_png_base64(fig)))

    fig, ax = plt.subplots(figsize=(13, 4.5))
    for r in landed:
        h = r["history"]
        ax.plot(h["t_s"], h["throttle"], lw=0.6, alpha=0.4, color="tab:blue")
    ax.axhline(vehicle.throttle_min, color="k", ls="--", label="throttle_min")
    ax.axhline(vehicle.throttle_max, color="tab:red", ls=":", label="throttle_max (planning limit)")
    ax.set_xlabel("time [s]")
    ax.set_ylabel("delivered throttle")
    ax.set_title("throttle histories (sampled every history step; the engine cuts off at touchdown)")
    ax.legend()
    figs.append(("Throttle histories", figure_png_base64(fig)))

    fig, ax = plt.subplots(figsize=(13, 4))
    tgo = [x for r in records for x in r.get("failure_time_to_go_s", [])]
    if tgo:
        ax.hist(tgo, bins=40, color="tab:red", alpha=0.7)
    ax.set_xlabel("time to go at the failed re-plan [s]")
    ax.set_ylabel("failed re-plans")
    ax.set_title(f"guidance calls without a flyable plan, by time to go ({len(tgo)} in all "
                 "runs; the last good plan was followed each time)")
    figs.append(("Calls without a flyable plan", figure_png_base64(fig)))
    return figs
