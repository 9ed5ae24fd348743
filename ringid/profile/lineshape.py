"""Line shapes shared by the profile fit, the calibration and the simulator (units of g, 1/nm)."""

from __future__ import annotations

import math

import numpy as np

LN2 = math.log(2.0)
GAUSS_HEIGHT = 2.0 * math.sqrt(LN2 / math.pi)  # peak height × FWHM of a unit-area Gaussian
LORENTZ_HEIGHT = 2.0 / math.pi  # peak height × FWHM of a unit-area Lorentzian


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


def pseudo_voigt(g, g0, fwhm, eta, area=1.0):
    """Area-normalised pseudo-Voigt η·L + (1−η)·G with common FWHM (1/nm); times ``area``."""
    x = np.asarray(g, dtype=float) - g0
    u = 4.0 * (x / fwhm) ** 2
    gauss = GAUSS_HEIGHT / fwhm * np.exp(-LN2 * u)
    lorentz = LORENTZ_HEIGHT / fwhm / (1.0 + u)
    return area * (eta * lorentz + (1.0 - eta) * gauss)


def pseudo_voigt_integral_breadth(fwhm, eta):
    """Integral breadth β = area/height of a pseudo-Voigt: β = Γ / [η·2/π + (1−η)·2√(ln2/π)].

    Limits: Gaussian β = 1.0645 Γ, Lorentzian β = (π/2) Γ (computed from the two shapes' area/height).
    """
    return fwhm / (eta * LORENTZ_HEIGHT + (1.0 - eta) * GAUSS_HEIGHT)
