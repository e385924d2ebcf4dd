"""The 1976 standard atmosphere (codegen/model/atmosphere.py) against an
independent implementation, and its slopes against finite differences."""

import numpy as np
import pytest

from codegen.errors import InputError
from codegen.model.atmosphere import (BASE_PRESSURE_PA, BASE_TEMPERATURE_K,
                                      ExponentialAtmosphere, StandardAtmosphere1976)

ALTITUDES_M = np.linspace(0.0, 30000.0, 121)


def test_matches_ambiance_0_to_30_km():
    # Source: the `ambiance` package (PyPI, 1.3.1), which implements the ICAO
    # Standard Atmosphere (Doc 7488/3, 1993); below 32 km it is identical to
    # the U.S. Standard Atmosphere, 1976. Temperatures agree exactly; the
    # other quantities to a few 1e-6, because ambiance takes the ICAO
    # specific gas constant 287.05287 J/(kg K) where the 1976 standard takes
    # R*/M0 = 8314.32/28.9644 = 287.0531 (measured worst: 4.5e-6 relative on
    # pressure at 30 km). The tolerance 1e-5 is twice that.
    import ambiance
    ours = StandardAtmosphere1976().properties(ALTITUDES_M)
    ref = ambiance.Atmosphere(ALTITUDES_M)
    np.testing.assert_allclose(ours.temperature_k, ref.temperature, rtol=1e-12)
    np.testing.assert_allclose(ours.pressure_pa, ref.pressure, rtol=1e-5)
    np.testing.assert_allclose(ours.density_kgpm3, ref.density, rtol=1e-5)
    np.testing.assert_allclose(ours.sound_speed_mps, ref.speed_of_sound, rtol=1e-5)


def test_sea_level_and_tropopause_values():
    # The 1976 standard's defining sea-level values (its Table 2: 288.15 K,
    # 101325 Pa) and its tropopause at 11 km geopotential, 216.65 K; the
    # sea-level density 1.2250 kg/m^3 of its tables (value recalled from
    # memory of the standard's table, to its four printed digits).
    sl = StandardAtmosphere1976().properties(0.0)
    assert sl.temperature_k[0] == 288.15 and sl.pressure_pa[0] == 101325.0
    assert abs(sl.density_kgpm3[0] - 1.2250) < 5e-5
    assert BASE_TEMPERATURE_K[1] == pytest.approx(216.65, abs=1e-9)
    assert BASE_PRESSURE_PA[0] == 101325.0 and BASE_PRESSURE_PA[1] < BASE_PRESSURE_PA[0]


@pytest.mark.parametrize("model", [StandardAtmosphere1976(), ExponentialAtmosphere(1.225, 8500.0, 340.0)])
def test_slopes_match_finite_differences(model):
    h = np.array([-2000.0, 10.0, 5000.0, 10999.0, 15000.0, 25000.0, 40000.0, 60000.0])
    step = 0.01
    p, hi, lo = (model.properties(h + d) for d in (0.0, step, -step))
    np.testing.assert_allclose((hi.density_kgpm3 - lo.density_kgpm3) / (2 * step),
                               p.density_slope_kgpm4, rtol=1e-6)
    np.testing.assert_allclose((hi.sound_speed_mps - lo.sound_speed_mps) / (2 * step),
                               p.sound_speed_slope_ps, atol=1e-9)


def test_out_of_range_refused_naming_the_altitude():
    with pytest.raises(InputError) as err:
        StandardAtmosphere1976().properties([0.0, 90000.0])
    assert "altitude_m" in str(err.value) and "90000" in str(err.value)
