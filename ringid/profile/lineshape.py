"""Line shapes shared by the profile fit, the calibration and the simulator (units of g, 1/nm)."""

from __future__ import annotations

import math

import numpy as np

def voigt_as_pseudo_voigt(gauss_fwhm: float, lorentz_fwhm: float) -> tuple[float, float]:
    """Total FWHM and Lorentzian fraction η of a Voigt approximated by a pseudo-Voigt.

    Thompson, Cox & Hastings (1987), J. Appl. Cryst. 20, 79–83.
    """
    g, lo = gauss_fwhm, lorentz_fwhm
    total = (g**5 + 2.69269 * g**4 * lo + 2.42843 * g**3 * lo**2 + 4.47163 * g**2 * lo**3
             + 0.07842 * g * lo**4 + lo**5) ** 0.2
    if total == 0:
        return 0.0, 0.0
    r = lo / total
    eta = 1.36603 * r - 0.47719 * r**2 + 0.11116 * r**3
    return total, float(min(max(eta, 0.0), 1.0))


def unit_pseudo_voigt(x, fwhm: float, eta: float):
    """Unit-area pseudo-Voigt of full width ``fwhm`` and Lorentzian fraction ``eta`` centred at 0."""
    hw = 0.5 * fwhm
    gauss = math.sqrt(math.log(2) / math.pi) / hw * np.exp(-math.log(2) * (x / hw) ** 2)
    lorentz = (1.0 / (math.pi * hw)) / (1.0 + (x / hw) ** 2)
    return (1.0 - eta) * gauss + eta * lorentz

