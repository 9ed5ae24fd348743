"""Units and the electron wavelength.

Conventions (docs/design.md): g = 1/d in 1/nm, d in ångström, camera constant
K = λL/p in Å·px so that d = K / R with R in pixels. q = 2π/d appears only at
the pyFAI boundary.
"""

from __future__ import annotations

import math

# CODATA constants from scipy would cost an import of scipy on cheap paths; the
# values below are CODATA 2018/2022 exact or recommended values, identical to
# scipy.constants (checked in tests/test_units.py).
PLANCK_J_S = 6.62607015e-34  # exact (SI 2019)
ELECTRON_MASS_KG = 9.1093837139e-31  # CODATA 2022
ELEMENTARY_CHARGE_C = 1.602176634e-19  # exact (SI 2019)
SPEED_OF_LIGHT_M_S = 299792458.0  # exact


def electron_wavelength_angstrom(voltage_kv: float) -> float:
    """Relativistic electron wavelength in Å for an accelerating voltage in kV.

    λ = h / sqrt(2 m0 e V (1 + eV / (2 m0 c²))).
    """
    if not voltage_kv > 0:
        raise ValueError(f"voltage must be positive, got {voltage_kv} kV")
    ev = ELEMENTARY_CHARGE_C * voltage_kv * 1e3
    m0 = ELECTRON_MASS_KG
    p = math.sqrt(2.0 * m0 * ev * (1.0 + ev / (2.0 * m0 * SPEED_OF_LIGHT_M_S**2)))
    return PLANCK_J_S / p * 1e10


def nominal_camera_constant_a_px(camera_length_mm: float, pixel_size_um: float, voltage_kv: float) -> float:
    """Camera constant K = λL/p in Å·px from a nominal camera length and pixel size."""
    lam = electron_wavelength_angstrom(voltage_kv)
    return lam * (camera_length_mm * 1e-3) / (pixel_size_um * 1e-6)
