"""Air density and the speed of sound for the drag model (issue 19).

Two models, both giving, at an altitude above mean sea level, the density,
its derivative with altitude, the speed of sound and its derivative (the
successive convexification linearises the drag and needs all four):

- :class:`StandardAtmosphere1976`: the U.S. Standard Atmosphere, 1976
  (NOAA, NASA and USAF, U.S. Government Printing Office, Washington D.C.,
  1976), from its published layer table, up to 86 km geometric altitude
  (84.852 km geopotential): temperature linear in geopotential altitude in
  each layer (the table's lapse rates), pressure from the hydrostatic
  equation integrated layer by layer (so the base pressures are computed
  here, not copied), density from the perfect-gas law, the speed of sound
  sqrt(gamma R* T / M0). Below sea level the first layer is continued down
  to -5 km, as the standard's own tables are.
- :class:`ExponentialAtmosphere`: rho = rho_sl exp(-h / H), with a constant
  speed of sound (the user's values: a vehicle file's [atmosphere] table).

Altitudes are geometric, in metres above mean sea level.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from codegen.errors import InputError

# Constants of the 1976 standard (its Table 2 and section 1.2).
#: Sea-level value of the acceleration of gravity, m/s^2 (= standard gravity).
G0_MPS2 = 9.80665
#: Mean molecular weight of sea-level air, kg/kmol.
MOLAR_MASS_KG_PER_KMOL = 28.9644
#: Universal gas constant as the 1976 standard takes it, J/(kmol K).
GAS_CONSTANT_J_PER_KMOL_K = 8.31432e3
#: Ratio of specific heats of air.
HEAT_RATIO = 1.4
#: Effective Earth radius of the geopotential altitude, m.
EARTH_RADIUS_M = 6356766.0
#: Sea-level temperature (K) and pressure (Pa).
TEMPERATURE_SEA_LEVEL_K = 288.15
PRESSURE_SEA_LEVEL_PA = 101325.0

#: The layer table (geopotential base altitude in m', lapse rate in K/m'),
#: from 0 to 84.852 km' (the 1976 standard, its Table 4).
LAYERS = (
    (0.0, -6.5e-3),
    (11000.0, 0.0),
    (20000.0, 1.0e-3),
    (32000.0, 2.8e-3),
    (47000.0, 0.0),
    (51000.0, -2.8e-3),
    (71000.0, -2.0e-3),
)
TOP_GEOPOTENTIAL_M = 84852.0
#: Altitude range served (geometric, m): -5 km (the first layer continued,
#: as the standard's tables start) to 86 km (the top of the layer table).
ALTITUDE_MIN_M = -5000.0
ALTITUDE_MAX_M = 86000.0


def _base_values():
    """Base temperature and pressure of each layer, by the hydrostatic
    equation: dp/dH = -g0 M0 p / (R* T) with T = Tb + L (H - Hb)."""
    gmr = G0_MPS2 * MOLAR_MASS_KG_PER_KMOL / GAS_CONSTANT_J_PER_KMOL_K
    temps, press = [TEMPERATURE_SEA_LEVEL_K], [PRESSURE_SEA_LEVEL_PA]
    tops = [h for h, _ in LAYERS[1:]] + [TOP_GEOPOTENTIAL_M]
    for (hb, lapse), htop in zip(LAYERS, tops):
        tb, pb = temps[-1], press[-1]
        dh = htop - hb
        t_top = tb + lapse * dh
        if lapse == 0.0:
            p_top = pb * math.exp(-gmr * dh / tb)
        else:
            p_top = pb * (t_top / tb) ** (-gmr / lapse)
        temps.append(t_top)
        press.append(p_top)
    return tuple(temps[:-1]), tuple(press[:-1])


BASE_TEMPERATURE_K, BASE_PRESSURE_PA = _base_values()


def geopotential_altitude_m(h_m):
    """H = r0 h / (r0 + h) (the 1976 standard, its equation 18)."""
    return EARTH_RADIUS_M * np.asarray(h_m, float) / (EARTH_RADIUS_M + np.asarray(h_m, float))


@dataclass(frozen=True)
class AirProperties:
    """Arrays over altitudes: density (kg/m^3) and its derivative with
    geometric altitude (kg/m^4); speed of sound (m/s) and its derivative
    (1/s); temperature (K) and pressure (Pa) where the model has them."""

    density_kgpm3: np.ndarray
    density_slope_kgpm4: np.ndarray
    sound_speed_mps: np.ndarray
    sound_speed_slope_ps: np.ndarray
    temperature_k: np.ndarray
    pressure_pa: np.ndarray


class StandardAtmosphere1976:
    """The U.S. Standard Atmosphere, 1976, from -5 km to 86 km."""

    name = "standard_1976"

    def properties(self, altitude_m) -> AirProperties:
        h = np.atleast_1d(np.asarray(altitude_m, float))
        bad = ~((h >= ALTITUDE_MIN_M) & (h <= ALTITUDE_MAX_M))
        if np.any(bad):
            x = float(h[bad][0])
            raise InputError("altitude_m", x,
                             f"the 1976 standard atmosphere is served from {ALTITUDE_MIN_M:g} "
                             f"to {ALTITUDE_MAX_M:g} m")
        gmr = G0_MPS2 * MOLAR_MASS_KG_PER_KMOL / GAS_CONSTANT_J_PER_KMOL_K
        hg = geopotential_altitude_m(h)
        dhg_dh = (EARTH_RADIUS_M / (EARTH_RADIUS_M + h)) ** 2
        bases = np.array([b for b, _ in LAYERS])
        idx = np.clip(np.searchsorted(bases, hg, side="right") - 1, 0, len(LAYERS) - 1)
        hb = bases[idx]
        lapse = np.array([lr for _, lr in LAYERS])[idx]
        tb = np.array(BASE_TEMPERATURE_K)[idx]
        pb = np.array(BASE_PRESSURE_PA)[idx]
        temp = tb + lapse * (hg - hb)
        iso = lapse == 0.0
        with np.errstate(divide="ignore", invalid="ignore"):
            p_grad = pb * (temp / tb) ** (-gmr / np.where(iso, 1.0, lapse))
        p_iso = pb * np.exp(-gmr * (hg - hb) / tb)
        press = np.where(iso, p_iso, p_grad)
        r_air = GAS_CONSTANT_J_PER_KMOL_K / MOLAR_MASS_KG_PER_KMOL
        rho = press / (r_air * temp)
        # d ln(rho)/dH = d ln(p)/dH - d ln(T)/dH = -g0 M0 / (R* T) - L / T.
        drho = rho * (-gmr / temp - lapse / temp) * dhg_dh
        c = np.sqrt(HEAT_RATIO * r_air * temp)
        dc = 0.5 * c * lapse / temp * dhg_dh
        return AirProperties(rho, drho, c, dc, temp, press)


class ExponentialAtmosphere:
    """rho = rho_sl exp(-h / H) and a constant speed of sound."""

    name = "exponential"

    def __init__(self, density_sea_level_kgpm3: float, scale_height_m: float,
                 sound_speed_mps: float):
        self.density_sea_level_kgpm3 = float(density_sea_level_kgpm3)
        self.scale_height_m = float(scale_height_m)
        self.sound_speed_mps = float(sound_speed_mps)

    def properties(self, altitude_m) -> AirProperties:
        h = np.atleast_1d(np.asarray(altitude_m, float))
        rho = self.density_sea_level_kgpm3 * np.exp(-h / self.scale_height_m)
        nan = np.full_like(h, math.nan)
        return AirProperties(rho, -rho / self.scale_height_m,
                             np.full_like(h, self.sound_speed_mps), np.zeros_like(h), nan, nan)
