"""Sersic profiles against Ciotti & Bertin (1999) and galsim.Sersic."""

from __future__ import annotations

import math

import galsim
import numpy as np
import pytest
from scipy import integrate

from simlens.imaging.light import CompositeLight, Sersic, sersic_b


def ciotti_bertin_b(n: float) -> float:
    # Asymptotic expansion of b_n, Ciotti & Bertin (1999, A&A 352, 447), eq. (18).
    return (2 * n - 1 / 3 + 4 / (405 * n) + 46 / (25515 * n**2) + 131 / (1148175 * n**3)
            - 2194697 / (30690717750 * n**4))


@pytest.mark.parametrize("n, tolerance", [(1.0, 5e-5), (2.0, 3e-6), (4.0, 2e-7), (6.0, 5e-8), (8.0, 1e-8)])
def test_b_n_matches_ciotti_bertin_expansion(n, tolerance):
    # The expansion is asymptotic in 1/n: its error falls from ~2.5e-5 at n = 1 to ~4e-9 at n = 8
    # (measured here); the tolerances bound those errors, so an error in b_n would show.
    assert sersic_b(n) == pytest.approx(ciotti_bertin_b(n), rel=tolerance)


def test_b_n_of_a_gaussian_is_ln2():
    # n = 1/2 is a Gaussian, I ~ exp(-ln2 (R/R_e)^2): b = ln 2 exactly (analytic).
    assert sersic_b(0.5) == pytest.approx(math.log(2.0), rel=1e-12)


def test_b_n_known_values():
    # b_1 = 1.67835, b_4 = 7.66925 (Graham & Driver 2005, PASA 22, 118, sect. 2.1).
    assert sersic_b(1.0) == pytest.approx(1.67835, abs=1e-5)
    assert sersic_b(4.0) == pytest.approx(7.66925, abs=1e-5)


@pytest.mark.parametrize("n, q, angle", [(1.0, 1.0, 0.0), (4.0, 0.6, 30.0), (0.7, 0.45, -70.0), (2.5, 0.8, 110.0)])
def test_surface_brightness_matches_galsim_sersic(n, q, angle):
    # galsim.Sersic with an area-preserving shear (q, beta) is the reference profile.
    ours = Sersic(flux=1234.0, half_light_radius=0.7, sersic_index=n, q=q, angle=angle, center=(0.1, -0.2))
    ref = galsim.Sersic(n=n, half_light_radius=0.7, flux=1234.0).shear(q=q, beta=angle * galsim.degrees).shift(0.1, -0.2)
    rng = np.random.default_rng(3)
    for x, y in rng.uniform(-2, 2, size=(25, 2)):
        assert ours.surface_brightness(x, y) == pytest.approx(ref.xValue(galsim.PositionD(x, y)), rel=2e-4)


@pytest.mark.parametrize("n", [0.5, 1.0, 4.0])
def test_total_flux_normalisation(n):
    # Integrating I(R) 2 pi R dR over the circular profile returns the flux (analytic normalisation).
    profile = Sersic(flux=10.0, half_light_radius=0.5, sersic_index=n)
    total, _ = integrate.quad(lambda r: profile.surface_brightness(r, 0.0) * 2 * math.pi * r, 0, np.inf, limit=500)
    assert total == pytest.approx(10.0, rel=1e-6)
    half, _ = integrate.quad(lambda r: profile.surface_brightness(r, 0.0) * 2 * math.pi * r, 0, 0.5, limit=200)
    assert half == pytest.approx(5.0, rel=1e-6)


def test_composite_light_adds_and_rescales():
    a = Sersic(flux=3.0, half_light_radius=0.5)
    b = Sersic(flux=1.0, half_light_radius=0.1, sersic_index=0.5, center=(0.2, 0.0))
    total = a + b
    assert isinstance(total, CompositeLight) and total.flux == pytest.approx(4.0)
    assert total.surface_brightness(0.1, 0.1) == pytest.approx(a.surface_brightness(0.1, 0.1) + b.surface_brightness(0.1, 0.1))
    doubled = total.with_flux(8.0)
    assert doubled.flux == pytest.approx(8.0)
    assert doubled.components[1].flux == pytest.approx(2.0)


@pytest.mark.parametrize("kwargs", [dict(half_light_radius=0.0), dict(sersic_index=0.1), dict(q=0.0), dict(flux=-1.0)])
def test_sersic_rejects_out_of_range_values(kwargs):
    params = dict(flux=1.0, half_light_radius=0.5, sersic_index=1.0, q=0.8)
    params.update(kwargs)
    with pytest.raises(ValueError):
        Sersic(**params)
