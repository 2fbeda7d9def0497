r"""Moisture conversions at a stated pressure: dewpoint, relative humidity and temperature,
specific humidity.

Pure functions of numpy arrays or DataArrays (lazily for dask), used by
:mod:`analogs.stages.sources` to give a store the moisture field it was built from when a
target or an archive holds another one: 850 hPa specific humidity from 850 hPa dewpoint or
from 850 hPa relative humidity and temperature, and 2 m dewpoint from 2 m relative
humidity and temperature or from 2 m specific humidity and surface pressure.

Units: temperatures and dewpoints in K, pressures and vapour pressures in hPa, specific
humidity in kg kg-1, relative humidity as a fraction (0-1, with respect to liquid water).

Formulas (constants in :mod:`analogs.constants`):

.. math::

    e_s(T) = A \exp\left(\frac{B\,T_c}{T_c + C}\right), \quad T_c = T - 273.15,
    \qquad A = 6.112\ \mathrm{hPa},\ B = 17.67,\ C = 243.5\ ^\circ\mathrm{C}

    e = \frac{q\,p}{\varepsilon + (1 - \varepsilon)\,q}
    \iff q = \frac{\varepsilon\,e}{p - (1 - \varepsilon)\,e}, \qquad \varepsilon = R_d/R_v = 0.622

    T_d = \frac{C \ln(e/A)}{B - \ln(e/A)} + 273.15

References: Bolton, D., 1980: The computation of equivalent potential temperature.
Mon. Wea. Rev., 108, 1046-1053 (eq. 10 and its inverse); the vapour pressure from the
definition of specific humidity (WMO No. 8, annex 4.A). MetPy's
``specific_humidity_from_dewpoint``, ``dewpoint_from_relative_humidity`` and
``dewpoint_from_specific_humidity`` are the references of the tests.
"""

from __future__ import annotations

import numpy as np

from analogs.constants import BOLTON_A_HPA, BOLTON_B, BOLTON_C_DEGC, EPSILON, ZERO_CELSIUS_K

__all__ = [
    "saturation_vapour_pressure",
    "vapour_pressure_from_specific_humidity",
    "specific_humidity_from_vapour_pressure",
    "dewpoint_from_vapour_pressure",
    "specific_humidity_from_dewpoint",
    "specific_humidity_from_relative_humidity",
    "dewpoint_from_relative_humidity",
    "dewpoint_from_specific_humidity",
]


def saturation_vapour_pressure(temperature_k):
    """Saturation vapour pressure over liquid water (hPa) at ``temperature_k`` (K).

    Bolton (1980), eq. 10: ``es = 6.112 exp(17.67 Tc / (Tc + 243.5))``, Tc in deg C.
    """
    celsius = temperature_k - ZERO_CELSIUS_K
    return BOLTON_A_HPA * np.exp(BOLTON_B * celsius / (celsius + BOLTON_C_DEGC))


def vapour_pressure_from_specific_humidity(q, pressure_hpa):
    """Vapour pressure (hPa) of air with specific humidity ``q`` (kg kg-1) at
    ``pressure_hpa``: ``e = q p / (eps + (1 - eps) q)``, eps = 0.622."""
    return q * pressure_hpa / (EPSILON + (1.0 - EPSILON) * q)


def specific_humidity_from_vapour_pressure(vapour_pressure_hpa, pressure_hpa):
    """Specific humidity (kg kg-1) of air with vapour pressure ``e`` (hPa) at
    ``pressure_hpa``: ``q = eps e / (p - (1 - eps) e)``, the inverse of
    :func:`vapour_pressure_from_specific_humidity`."""
    e = vapour_pressure_hpa
    return EPSILON * e / (pressure_hpa - (1.0 - EPSILON) * e)


def dewpoint_from_vapour_pressure(vapour_pressure_hpa):
    """Dewpoint (K) of air with vapour pressure ``e`` (hPa): Bolton's (1980) eq. 10
    inverted, ``Td = 243.5 ln(e / 6.112) / (17.67 - ln(e / 6.112))`` deg C.

    Zero or negative vapour pressure gives NaN (no dewpoint).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        log_ratio = np.log(vapour_pressure_hpa / BOLTON_A_HPA)
        return BOLTON_C_DEGC * log_ratio / (BOLTON_B - log_ratio) + ZERO_CELSIUS_K


def specific_humidity_from_dewpoint(dewpoint_k, pressure_hpa):
    """Specific humidity (kg kg-1) at ``pressure_hpa`` of air with dewpoint
    ``dewpoint_k`` (K): the vapour pressure is the saturation vapour pressure at the
    dewpoint (Bolton 1980), then ``q = eps e / (p - (1 - eps) e)``."""
    return specific_humidity_from_vapour_pressure(saturation_vapour_pressure(dewpoint_k),
                                                  pressure_hpa)


def specific_humidity_from_relative_humidity(temperature_k, relative_humidity, pressure_hpa):
    """Specific humidity (kg kg-1) at ``pressure_hpa`` from temperature (K) and relative
    humidity (fraction, over liquid water): ``e = RH es(T)`` (Bolton 1980), then
    ``q = eps e / (p - (1 - eps) e)``."""
    e = relative_humidity * saturation_vapour_pressure(temperature_k)
    return specific_humidity_from_vapour_pressure(e, pressure_hpa)


def dewpoint_from_relative_humidity(temperature_k, relative_humidity):
    """Dewpoint (K) from temperature (K) and relative humidity (fraction):
    ``e = RH es(T)``, then Bolton's (1980) formula inverted. Independent of pressure."""
    return dewpoint_from_vapour_pressure(
        relative_humidity * saturation_vapour_pressure(temperature_k))


def dewpoint_from_specific_humidity(q, pressure_hpa):
    """Dewpoint (K) at ``pressure_hpa`` (a number or an array such as the surface
    pressure) of air with specific humidity ``q`` (kg kg-1):
    ``e = q p / (eps + (1 - eps) q)``, then Bolton's (1980) formula inverted."""
    return dewpoint_from_vapour_pressure(vapour_pressure_from_specific_humidity(q, pressure_hpa))
