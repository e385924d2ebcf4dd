"""Aerodynamic drag of a booster as an acceleration, with its derivatives.

Point-mass drag with the air at rest in the landing frame (no wind):

    a_drag = D / m = -(1/2) rho(h) Cd(M) A |v| v / m,   M = |v| / c(h),

h = site_altitude_m + up(r) (altitude above mean sea level). This is the
drag term of Szmuk, Acikmese & Berning (2016), "Successive convexification
for fuel-optimal powered landing with aerodynamic drag and non-convex
constraints", AIAA GNC Conference; Cd may also depend on Mach here (a
table, linear between its points, held at its ends).

With the project's variables (problem.py: z = ln m), 1/m = exp(-z), so the
drag depends on (up(r), v, z). ``derivatives`` gives the Jacobian the
successive convexification linearises with (codegen/model/scvx.py):

    d a / d h = -(A/2) e^-z |v| v [rho' Cd + rho Cd'(M) dM/dh],  dM/dh = -M c'/c
    d a / d v = -(A/2) e^-z rho [Cd |v| I + (Cd + M Cd'(M)) v v^T / |v|]
    d a / d z = -a
"""

from __future__ import annotations

import numpy as np

from codegen.model.atmosphere import ExponentialAtmosphere, StandardAtmosphere1976

#: Below this speed (m/s) the direction of v is taken as undefined and the
#: v v^T / |v| term of the Jacobian as zero (its limit is zero). It is far
#: below any landing-burn speed; the term is O(|v|), so the choice is harmless.
SPEED_FLOOR_MPS = 1e-9


def atmosphere_model(atmosphere):
    """The atmosphere model of a vehicle's [atmosphere] table."""
    if atmosphere.model == "standard_1976":
        return StandardAtmosphere1976()
    return ExponentialAtmosphere(atmosphere.density_sea_level_kgpm3, atmosphere.scale_height_m,
                                 atmosphere.sound_speed_mps)


class DragModel:
    """Drag of one vehicle (its [drag] and [atmosphere] tables), vectorised
    over rows of states."""

    def __init__(self, booster):
        self.drag = booster.drag
        self.site_altitude_m = booster.atmosphere.site_altitude_m
        self.air = atmosphere_model(booster.atmosphere)

    def coefficient(self, mach):
        """Cd(M) and dCd/dM."""
        d = self.drag
        mach = np.asarray(mach, float)
        if not d.is_table:
            return np.full_like(mach, d.drag_coefficient[0]), np.zeros_like(mach)
        xs, ys = np.asarray(d.mach), np.asarray(d.drag_coefficient)
        cd = np.interp(mach, xs, ys)
        i = np.clip(np.searchsorted(xs, mach, side="right") - 1, 0, len(xs) - 2)
        slope = (ys[i + 1] - ys[i]) / (xs[i + 1] - xs[i])
        inside = (mach >= xs[0]) & (mach < xs[-1])
        return cd, np.where(inside, slope, 0.0)

    def acceleration(self, up_m, velocity_mps, mass_kg):
        """a_drag (rows of 3, m/s^2) at heights above the frame's origin
        ``up_m`` (n), velocities (n, 3) and masses (n)."""
        return self.derivatives(up_m, velocity_mps, mass_kg)[0]

    def derivatives(self, up_m, velocity_mps, mass_kg):
        """(a, da/dh (n,3), da/dv (n,3,3), da/dm (n,3)) in SI units."""
        h = self.site_altitude_m + np.asarray(up_m, float)
        v = np.atleast_2d(np.asarray(velocity_mps, float))
        m = np.asarray(mass_kg, float)
        air = self.air.properties(h)
        rho, drho = air.density_kgpm3, air.density_slope_kgpm4
        c, dc = air.sound_speed_mps, air.sound_speed_slope_ps
        speed = np.linalg.norm(v, axis=1)
        mach = speed / c
        cd, dcd = self.coefficient(mach)
        k = 0.5 * self.drag.reference_area_m2 / m          # (A/2)/m
        a = -(k * rho * cd * speed)[:, None] * v
        dmach_dh = -mach * dc / c
        da_dh = -(k * speed * (drho * cd + rho * dcd * dmach_dh))[:, None] * v
        safe = np.maximum(speed, SPEED_FLOOR_MPS)
        outer = np.einsum("ni,nj->nij", v, v) / safe[:, None, None]
        outer[speed < SPEED_FLOOR_MPS] = 0.0
        eye = np.eye(3)[None, :, :]
        da_dv = -(k * rho)[:, None, None] * ((cd * speed)[:, None, None] * eye
                                             + (cd + mach * dcd)[:, None, None] * outer)
        da_dm = -a / m[:, None]
        return a, da_dh, da_dv, da_dm
