"""Pictures: a descent plan (where a picture beats a table), and any figure as
a data URI for the self-contained reports."""

from __future__ import annotations

import base64
import io
import math

import numpy as np

from codegen.fsutil import write_atomic
from codegen.model.trajectory import Trajectory
from codegen.model.vehicle import Vehicle


def plot_trajectory(traj: Trajectory, vehicle: Vehicle, path, target_m=(0.0, 0.0, 0.0)) -> None:
    """Side view, ground track and a 3-D view with the glide-slope cone (all
    relative to the target), throttle as a fraction of thrust_max_n against
    its bounds, pointing against its limit, speed against its limit, mass."""
    plot_figure(traj, vehicle, target_m)
    import matplotlib.pyplot as plt
    fig = plt.gcf()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    plt.close(fig)
    write_atomic(path, buf.getvalue())


def plot_figure(traj: Trajectory, vehicle: Vehicle, target_m=(0.0, 0.0, 0.0)):
    """The figure of plot_trajectory (matplotlib), left open for the caller."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(19, 8.5))
    ax = [[fig.add_subplot(2, 4, 1), fig.add_subplot(2, 4, 2),
           fig.add_subplot(2, 4, 3, projection="3d"), fig.add_subplot(2, 4, 4)],
          [fig.add_subplot(2, 4, 5), fig.add_subplot(2, 4, 6), fig.add_subplot(2, 4, 7),
           fig.add_subplot(2, 4, 8)]]
    fig.suptitle(f"{vehicle.name}: {traj.status}, time of flight {traj.time_of_flight_s:.2f} s, "
                 f"fuel {traj.fuel_kg:.2f} kg, N = {traj.horizon}")
    tgt = np.asarray(target_m, float)
    rel = "from the target" if not np.any(tgt) else \
        f"from the target ({tgt[0]:g}, {tgt[1]:g}, {tgt[2]:g}) m"
    r = np.asarray(traj.position_m) - tgt
    t = np.asarray(traj.t_s)
    horiz = np.linalg.norm(r[:, :2], axis=1)
    tan_gs = math.tan(math.radians(vehicle.glide_slope_deg))

    a = ax[0][0]
    a.plot(horiz, r[:, 2], "o-", ms=3, label="trajectory")
    span = max(horiz.max() * 1.1, 1.0)
    hs = np.linspace(0, span, 50)
    a.fill_between(hs, 0, hs * tan_gs, color="tab:red", alpha=0.2, label="outside glide slope")
    a.set_xlabel(f"horizontal distance {rel} [m]")
    a.set_ylabel("altitude above the target [m]")
    a.set_title("side view")
    a.legend()

    a = ax[0][1]
    a.plot(r[:, 0], r[:, 1], "o-", ms=3)
    a.plot([0], [0], "kx", ms=10, label="target")
    a.set_xlabel(f"x {rel} [m]")
    a.set_ylabel("y [m]")
    a.set_title("ground track")
    a.axis("equal")
    a.legend()

    a = ax[0][2]
    a.plot(r[:, 0], r[:, 1], r[:, 2], "o-", ms=2, label="trajectory")
    a.plot([0], [0], [0], "kx", ms=8, label="target")
    if tan_gs > 0.0:
        rad = np.linspace(0.0, span, 12)
        ang = np.linspace(0.0, 2.0 * math.pi, 37)
        rr, aa = np.meshgrid(rad, ang)
        a.plot_wireframe(rr * np.cos(aa), rr * np.sin(aa), rr * tan_gs, color="tab:red",
                         alpha=0.25, lw=0.5, label="glide-slope cone")
    a.set_xlabel("x [m]")
    a.set_ylabel("y [m]")
    a.set_zlabel("up [m]")
    a.set_title(f"3-D view, {rel}")
    a.legend(fontsize=8)

    a = ax[0][3]
    limit = traj.throttle_limit if math.isfinite(traj.throttle_limit) else vehicle.throttle_max
    a.step(t[:-1], traj.throttle, where="post", label="throttle")
    a.axhline(vehicle.throttle_min, color="k", ls="--", label=f"throttle_min {vehicle.throttle_min:g}")
    a.axhline(limit, color="k", ls=":", label=f"plan's limit {limit:g}")
    a.set_ylim(0.0, 1.05)
    a.set_xlabel("time [s]")
    a.set_ylabel("throttle [fraction of thrust_max_n]")
    a.set_title("throttle")
    a.legend(fontsize=8)

    a = ax[1][0]
    tn = np.linalg.norm(traj.thrust_n, axis=1)
    up = np.asarray(traj.thrust_n)[:, 2]
    ang = np.degrees(np.arccos(np.clip(up / np.maximum(tn, 1e-12), -1, 1)))
    a.step(t[:-1], ang, where="post", label="from vertical")
    a.axhline(vehicle.pointing_max_deg, color="k", ls="--", label="limit")
    a.set_xlabel("time [s]")
    a.set_ylabel("pointing [deg]")
    a.set_title("thrust pointing")
    a.legend()

    a = ax[1][1]
    a.plot(t, np.linalg.norm(traj.velocity_mps, axis=1), label="|v|")
    a.axhline(vehicle.speed_max_mps, color="k", ls="--", label="limit")
    a.set_xlabel("time [s]")
    a.set_ylabel("speed [m/s]")
    a.set_title("speed")
    a.legend()

    a = ax[1][2]
    a.plot(t, traj.mass_kg)
    a.axhline(vehicle.mass_dry_kg, color="k", ls="--", label="dry mass")
    a.set_xlabel("time [s]")
    a.set_ylabel("mass [kg]")
    a.set_title("mass")
    a.legend()

    a = ax[1][3]
    a.plot(t, r[:, 2], label="altitude")
    a.plot(t, horiz, label="horizontal distance")
    a.set_xlabel("time [s]")
    a.set_ylabel(f"[m], {rel}")
    a.set_title("distance to go")
    a.legend()
    fig.tight_layout()
    return fig


def figure_png_base64(fig, dpi: int = 100) -> str:
    """Render a matplotlib figure to a ``data:image/png;base64,...`` URI and close it."""
    import matplotlib.pyplot as plt
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")
