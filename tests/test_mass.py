"""Deflectors against published closed forms, handbook values and finite-difference identities."""

from __future__ import annotations

import math
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy import constants

from simlens.cosmology import ARCSEC_PER_RADIAN
from simlens.lensing.mass import (NFW, SIE, SIS, CompositeMass, ConvergenceSheet, CoredIsothermal, ExternalShear,
                          Multipole, PointMass, PowerLaw, SersicMass, TruncatedSIS, MassModel, ScaledDeflector)

RNG = np.random.default_rng(1)
# Test positions away from the singular centres (arcsec).
X = RNG.uniform(-2.5, 2.5, 40)
Y = RNG.uniform(-2.5, 2.5, 40)
KEEP = np.hypot(X, Y) > 0.2
X, Y = X[KEEP], Y[KEEP]

MODELS = [
    SIS(einstein_radius=1.1, center=(0.1, -0.2)),
    SIE(einstein_radius=1.3, q=0.55, angle=37.0, center=(0.05, 0.1)),
    SIE(einstein_radius=0.9, q=1.0),
    PointMass(einstein_radius=0.8, center=(-0.1, 0.05)),
    ExternalShear(gamma=0.07, angle=-25.0),
    ConvergenceSheet(kappa=0.12),
    SIE(einstein_radius=1.0, q=0.7, angle=10.0) + ExternalShear(gamma=0.05, angle=60.0) + ConvergenceSheet(kappa=0.05),
    PowerLaw(einstein_radius=1.2, slope=2.3, q=0.6, angle=25.0, center=(0.05, -0.05)),
    PowerLaw(einstein_radius=0.9, slope=1.6, q=0.35, angle=-40.0),
    CoredIsothermal(einstein_radius=1.1, core_radius=0.15, q=0.65, angle=70.0),
    CoredIsothermal(einstein_radius=1.1, core_radius=0.3),
    NFW(kappa_s=0.25, scale_radius=3.0),
    NFW(kappa_s=0.4, scale_radius=1.5, ellipticity=0.2, angle=35.0, center=(0.1, 0.0)),
    Multipole(order=4, strength=0.04, einstein_radius=1.2, angle=15.0),
    Multipole(order=3, strength=0.02, einstein_radius=1.0, angle=-60.0),
    TruncatedSIS(einstein_radius=0.05, truncation_radius=0.3, center=(0.9, 0.4)),
    SersicMass(kappa_e=0.4, half_light_radius=0.9, sersic_index=3.0, q=0.65, angle=20.0),
    # stars_and_halo: Sersic stars plus an NFW halo; and a lens rescaled to another source redshift
    SersicMass(kappa_e=0.3, half_light_radius=0.8, sersic_index=4.0, q=0.7, angle=10.0)
    + NFW(kappa_s=0.1, scale_radius=6.0, ellipticity=0.1, angle=10.0),
    ScaledDeflector(SIE(einstein_radius=1.1, q=0.6, angle=-20.0) + ExternalShear(gamma=0.04, angle=30.0), 1.3),
]


@pytest.mark.parametrize("model", [m for m in MODELS if type(m).deflection_and_hessian
                                   is not MassModel.deflection_and_hessian], ids=lambda m: type(m).__name__)
def test_analytic_hessians_equal_central_differences(model):
    # Models with a closed-form Hessian against central differences of their own deflection
    # (the Jacobian's definition, SEF 1992 eq. 5.20).
    analytic = model.deflection_and_hessian(X, Y)
    differenced = MassModel.deflection_and_hessian(model, X, Y)
    for a, d in zip(analytic[2:], differenced[2:]):
        np.testing.assert_allclose(a, d, atol=1e-6)


def _derivatives(f, x, y, h=1e-5):
    return (f(x + h, y) - f(x - h, y)) / (2 * h), (f(x, y + h) - f(x, y - h)) / (2 * h)


@pytest.mark.parametrize("model", MODELS, ids=lambda m: type(m).__name__)
def test_divergence_is_twice_convergence_and_curl_vanishes(model):
    # Poisson equation of lensing: div(alpha) = 2 kappa; alpha is a gradient, so curl(alpha) = 0
    # (Schneider, Ehlers & Falco 1992, eq. 5.8-5.9).
    dax_dx, dax_dy = _derivatives(lambda x, y: model.deflection(x, y)[0], X, Y)
    day_dx, day_dy = _derivatives(lambda x, y: model.deflection(x, y)[1], X, Y)
    np.testing.assert_allclose(dax_dx + day_dy, 2 * model.convergence(X, Y), atol=2e-6, rtol=1e-6)
    np.testing.assert_allclose(day_dx - dax_dy, 0.0, atol=2e-6)


@pytest.mark.parametrize("model", MODELS, ids=lambda m: type(m).__name__)
def test_deflection_is_gradient_of_potential(model):
    # alpha = grad(psi) (SEF 1992, eq. 5.7).
    dpsi_dx, dpsi_dy = _derivatives(model.potential, X, Y)
    ax, ay = model.deflection(X, Y)
    np.testing.assert_allclose(dpsi_dx, ax, atol=1e-6)
    np.testing.assert_allclose(dpsi_dy, ay, atol=1e-6)


def kormann_sie_deflection(x, y, b, q, angle_deg):
    """Independent form of the SIE deflection: Kormann, Schneider & Bartelmann (1994), eqs. (27)-(28),
    written with arcsin / arcsinh of the polar angle.  KSB94 put the major axis along x2 with
    kappa = sqrt(f) / (2 sqrt(x1^2 + f^2 x2^2)); here x2 -> x' (major axis) and x1 -> y'."""
    c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
    xp, yp = c * x + s * y, -s * x + c * y
    r = np.hypot(xp, yp)
    fp = math.sqrt(1 - q * q)
    a_major = b * math.sqrt(q) / fp * np.arcsin(fp * xp / r)
    a_minor = b * math.sqrt(q) / fp * np.arcsinh(fp / q * yp / r)
    return c * a_major - s * a_minor, s * a_major + c * a_minor


@pytest.mark.parametrize("q", [0.2, 0.55, 0.9, 0.999])
def test_sie_matches_kormann_schneider_bartelmann_1994(q):
    model = SIE(einstein_radius=1.4, q=q, angle=33.0)
    ax, ay = model.deflection(X, Y)
    kx, ky = kormann_sie_deflection(X, Y, 1.4, q, 33.0)
    np.testing.assert_allclose(ax, kx, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(ay, ky, rtol=1e-9, atol=1e-12)


def test_sie_convergence_normalisation():
    # The stated profile: kappa = (theta_E / 2) / sqrt(q x'^2 + y'^2 / q) in the rotated frame.
    model = SIE(einstein_radius=1.2, q=0.6, angle=90.0)  # major axis along +y
    # On the major axis (x' = 2, y' = 0) the density falls more slowly than on the minor axis.
    np.testing.assert_allclose(model.convergence(0.0, 2.0), 0.6 / math.sqrt(0.6 * 4.0))
    np.testing.assert_allclose(model.convergence(2.0, 0.0), 0.6 / math.sqrt(4.0 / 0.6))


def test_sie_reduces_to_sis_as_q_goes_to_one():
    # Common practice: the SIE tends to the SIS of the same Einstein radius as q -> 1.
    sis = SIS(einstein_radius=1.2)
    for q in (1.0, 1 - 1e-6):
        sie = SIE(einstein_radius=1.2, q=q, angle=17.0)
        np.testing.assert_allclose(np.array(sie.deflection(X, Y)), np.array(sis.deflection(X, Y)), atol=1e-6)
        np.testing.assert_allclose(sie.convergence(X, Y), sis.convergence(X, Y), rtol=1e-6)
        np.testing.assert_allclose(sie.potential(X, Y), sis.potential(X, Y), rtol=1e-6)


def test_sie_einstein_radius_encloses_mean_convergence_one():
    # The Einstein radius of the intermediate-axis normalised SIE: the elliptical critical-density
    # region (kappa >= 1/2 contour) has area pi theta_E^2 (mean convergence 1 inside the isodensity
    # contour of area pi theta_E^2; SEF 1992, sect. 8.1.4, for the circular case).
    model = SIE(einstein_radius=1.0, q=0.5)
    axis = np.linspace(-2.5, 2.5, 1001)
    gx, gy = np.meshgrid(axis, axis)
    inside = model.convergence(gx, gy) >= 0.5
    area = inside.sum() * (axis[1] - axis[0]) ** 2
    np.testing.assert_allclose(area, math.pi, rtol=5e-3)


@pytest.mark.parametrize("model", [SIS(einstein_radius=1.0), SIE(einstein_radius=1.0, q=1.0),
                                   SIE(einstein_radius=1.0, q=0.5), PointMass(einstein_radius=1.0)],
                         ids=lambda m: repr(m))
def test_centre_gives_finite_values_without_warnings(model):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        x = np.array([0.0, 1e-12, 0.0])
        y = np.array([0.0, 0.0, -1e-13])
        for values in (*model.deflection(x, y), model.convergence(x, y), model.potential(x, y)):
            assert np.all(np.isfinite(values))


def test_point_mass_deflection_at_the_solar_limb():
    # Light grazing the Sun is bent by 4 G M / (c^2 R) = 1.75 arcsec (Einstein 1915; Dyson, Eddington &
    # Davidson 1920).  With the source at infinity (D_ls / D_s = 1) and the Sun at D_l,
    # theta_E^2 = 4 G M / (c^2 D_l), and the scaled deflection at theta = R / D_l is the bending angle.
    d_l = (1 * u.au).to_value(u.m)
    four_gm_c2 = (4 * constants.G * constants.M_sun / constants.c**2).to_value(u.m)
    theta_e = math.sqrt(four_gm_c2 / d_l) * ARCSEC_PER_RADIAN
    limb = constants.R_sun.to_value(u.m) / d_l * ARCSEC_PER_RADIAN
    ax, ay = PointMass(einstein_radius=theta_e).deflection(np.array([limb]), np.array([0.0]))
    expected = four_gm_c2 / constants.R_sun.to_value(u.m) * ARCSEC_PER_RADIAN
    assert ax[0] == pytest.approx(expected, rel=1e-12)
    assert ax[0] == pytest.approx(1.75, abs=0.01)
    assert ay[0] == 0.0


def test_shear_potential_matches_definition():
    # psi = (gamma / 2) r^2 cos 2 (phi - angle), the stated convention.
    shear = ExternalShear(gamma=0.08, angle=25.0)
    r, phi = np.hypot(X, Y), np.arctan2(Y, X)
    np.testing.assert_allclose(shear.potential(X, Y), 0.04 * r**2 * np.cos(2 * (phi - np.radians(25.0))), atol=1e-14)


def test_shear_stretches_images_along_its_angle():
    # The Jacobian of a pure shear has eigenvalue 1 - gamma along `angle` (SEF 1992, eq. 5.21).
    shear = ExternalShear(gamma=0.1, angle=30.0)
    psi_xx, psi_xy, psi_yy = shear.hessian(np.array([0.3]), np.array([0.2]))
    a = np.array([[1 - psi_xx[0], -psi_xy[0]], [-psi_xy[0], 1 - psi_yy[0]]])
    direction = np.array([math.cos(math.radians(30)), math.sin(math.radians(30))])
    np.testing.assert_allclose(a @ direction, 0.9 * direction, atol=1e-8)


def test_composition_adds_and_flattens():
    a, b, c = SIS(einstein_radius=1.0), ExternalShear(gamma=0.05), ConvergenceSheet(kappa=0.1)
    total = a + b + c
    assert isinstance(total, CompositeMass) and len(total.components) == 3
    ax = a.deflection(X, Y)[0] + b.deflection(X, Y)[0] + c.deflection(X, Y)[0]
    np.testing.assert_allclose(total.deflection(X, Y)[0], ax)
    np.testing.assert_allclose(total.convergence(X, Y), a.convergence(X, Y) + 0.1)


def test_models_are_immutable_comparable_and_hashable():
    model = SIE(einstein_radius=1.0, q=0.7, angle=10.0)
    assert model == SIE(einstein_radius=1.0, q=0.7, angle=10.0)
    assert hash(model) == hash(SIE(einstein_radius=1.0, q=0.7, angle=10.0))
    with pytest.raises(AttributeError):
        model.q = 0.5  # type: ignore[misc]
    assert "q=0.7" in repr(model)


@pytest.mark.parametrize("make", [lambda: SIE(einstein_radius=1.0, q=0.0), lambda: SIE(einstein_radius=1.0, q=1.2),
                                  lambda: SIS(einstein_radius=-1.0), lambda: PointMass(einstein_radius=0.0),
                                  lambda: ExternalShear(gamma=-0.1), lambda: SIE(einstein_radius=1.0, center=(1,))])
def test_constructors_reject_out_of_range_values(make):
    with pytest.raises(ValueError):
        make()


def test_magnification_of_sis_matches_closed_form():
    # SIS: mu(theta) = |theta| / (|theta| - theta_E) (SEF 1992, eq. 8.37).
    sis = SIS(einstein_radius=1.0)
    theta = np.array([1.5, 2.0, 0.6])
    mu = sis.magnification(theta, np.zeros(3))
    np.testing.assert_allclose(mu, theta / (theta - 1.0), rtol=1e-6)
