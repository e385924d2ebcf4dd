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
    """Side view and ground track with the glide-slope cone, thrust against its
    bounds, pointing against its limit, speed against its limit."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(2, 3, figsize=(15, 8.5))
    fig.suptitle(f"{vehicle.name}: {traj.status}, time of flight {traj.time_of_flight_s:.2f} s, "
                 f"fuel {traj.fuel_kg:.2f} kg, N = {traj.horizon}")
    r = np.asarray(traj.position_m) - np.asarray(target_m)
    t = np.asarray(traj.t_s)
    horiz = np.linalg.norm(r[:, :2], axis=1)
    tan_gs = math.tan(math.radians(vehicle.glide_slope_deg))

    a = ax[0, 0]
    a.plot(horiz, r[:, 2], "o-", ms=3, label="trajectory")
    span = max(horiz.max() * 1.1, 1.0)
    hs = np.linspace(0, span, 50)
    a.fill_between(hs, 0, hs * tan_gs, color="tab:red", alpha=0.2, label="outside glide slope")
    a.set_xlabel("horizontal distance to target [m]")
    a.set_ylabel("altitude above target [m]")
    a.set_title("side view")
    a.legend()

    a = ax[0, 1]
    a.plot(r[:, 0], r[:, 1], "o-", ms=3)
    a.plot([0], [0], "kx", ms=10, label="target")
    a.set_xlabel("x [m]")
    a.set_ylabel("y [m]")
    a.set_title("ground track")
    a.axis("equal")
    a.legend()

    a = ax[0, 2]
    tn = np.linalg.norm(traj.thrust_n, axis=1)
    a.step(t[:-1], tn, where="post", label="|T|")
    a.axhline(vehicle.thrust_lower_n, color="k", ls="--", label="bounds")
    a.axhline(vehicle.thrust_upper_n, color="k", ls="--")
    a.set_xlabel("time [s]")
    a.set_ylabel("thrust [N]")
    a.set_title("thrust magnitude")
    a.legend()

    a = ax[1, 0]
    up = np.asarray(traj.thrust_n)[:, 2]
    ang = np.degrees(np.arccos(np.clip(up / np.maximum(tn, 1e-12), -1, 1)))
    a.step(t[:-1], ang, where="post", label="from vertical")
    a.axhline(vehicle.pointing_max_deg, color="k", ls="--", label="limit")
    a.set_xlabel("time [s]")
    a.set_ylabel("pointing [deg]")
    a.set_title("thrust pointing")
    a.legend()

    a = ax[1, 1]
    a.plot(t, np.linalg.norm(traj.velocity_mps, axis=1), label="|v|")
    a.axhline(vehicle.speed_max_mps, color="k", ls="--", label="limit")
    a.set_xlabel("time [s]")
    a.set_ylabel("speed [m/s]")
    a.set_title("speed")
    a.legend()

    a = ax[1, 2]
    a.plot(t, traj.mass_kg)
    a.axhline(vehicle.mass_dry_kg, color="k", ls="--", label="dry mass")
    a.set_xlabel("time [s]")
    a.set_ylabel("mass [kg]")
    a.set_title("mass")
    a.legend()
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    plt.close(fig)
    write_atomic(path, buf.getvalue())


def figure_png_base64(fig, dpi: int = 100) -> str:
    """Render a matplotlib figure to a ``data:image/png;base64,...`` URI and close it."""
    import matplotlib.pyplot as plt
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")
