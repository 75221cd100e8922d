"""Einstein radius from velocity dispersion against the closed form with independent distances."""

from __future__ import annotations

import math

import astropy.units as u
import pytest
from astropy import constants
from astropy.cosmology import FlatLambdaCDM, Planck18

from simlens.cosmology import distance_ratio, einstein_radius_sis


@pytest.mark.parametrize("sigma, z_l, z_s", [(250.0, 0.3, 1.5), (180.0, 0.5, 2.0), (320.0, 0.2, 0.9)])
def test_sis_einstein_radius_closed_form(sigma, z_l, z_s):
    # theta_E = 4 pi (sigma / c)^2 D_ls / D_s (Schneider, Ehlers & Falco 1992, eq. 8.36).  For a flat
    # universe D_ls = (D_M(z_s) - D_M(z_l)) / (1 + z_s) (Hogg 1999, astro-ph/9905116, eq. 19),
    # computed here from astropy's comoving transverse distance, independently of simlens.
    cosmo = FlatLambdaCDM(H0=70, Om0=0.3)
    d_m_l = cosmo.comoving_transverse_distance(z_l)
    d_m_s = cosmo.comoving_transverse_distance(z_s)
    ratio = ((d_m_s - d_m_l) / (1 + z_s) / cosmo.angular_diameter_distance(z_s)).decompose().value
    expected = 4 * math.pi * (sigma / constants.c.to_value(u.km / u.s)) ** 2 * ratio * 206264.806
    assert einstein_radius_sis(sigma, z_l, z_s, cosmo) == pytest.approx(expected, rel=1e-6)


def test_typical_lens_has_arcsecond_einstein_radius():
    # Handbook figure (from memory; e.g. Treu 2010, ARA&A 48, 87): sigma ~ 250 km/s at z_l ~ 0.3 with a
    # source at z_s ~ 2 gives theta_E of order 1.5 arcsec.
    theta = einstein_radius_sis(250.0, 0.3, 2.0, Planck18)
    assert 1.2 < theta < 1.8


def test_source_in_front_of_lens_is_not_lensed():
    assert distance_ratio(Planck18, 0.5, 0.4) == 0.0
    assert einstein_radius_sis(250.0, 0.5, 0.5, Planck18) == 0.0
