"""Electron wavelength and unit conversions."""

import pytest
import scipy.constants as sc

from ringid.core.units import (
    ELECTRON_MASS_KG,
    ELEMENTARY_CHARGE_C,
    PLANCK_J_S,
    SPEED_OF_LIGHT_M_S,
    electron_wavelength_angstrom,
    nominal_camera_constant_a_px,
)


def test_constants_are_codata():
    # source: scipy.constants (CODATA 2022)
    assert PLANCK_J_S == sc.h
    assert ELECTRON_MASS_KG == sc.m_e
    assert ELEMENTARY_CHARGE_C == sc.e
    assert SPEED_OF_LIGHT_M_S == sc.c


@pytest.mark.parametrize(
    "kv, pm",
    # source: electron-optics handbook table
    # (a microscope maker's published glossary: 3.7014, 2.5079, 1.9687 pm), given to 5 digits
    [(100, 3.7014), (200, 2.5079), (300, 1.9687), (80, 4.1757), (120, 3.3492)],
)
def test_electron_wavelength_handbook(kv, pm):
    assert electron_wavelength_angstrom(kv) * 100 == pytest.approx(pm, abs=0.00006)


def test_wavelength_rejects_nonpositive_voltage():
    with pytest.raises(ValueError):
        electron_wavelength_angstrom(0)


def test_nominal_camera_constant():
    # λL at 200 kV is 25.08 Å·mm per metre of camera length (computed from λ = 2.5079 pm):
    # L = 1000 mm, p = 10 µm -> K = 0.025079 Å × 1 m / 10 µm = 2507.9 Å·px
    assert nominal_camera_constant_a_px(1000, 10, 200) == pytest.approx(2507.9, rel=1e-4)
