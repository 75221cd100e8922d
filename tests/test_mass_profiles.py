"""The wider mass library against independent calculations: numerical integrals of the convergence,
first-principles light bending through 3D potentials, the mass-sheet degeneracy, multi-plane tracing."""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
import pytest
from astropy import constants
from astropy.cosmology import Planck18
from scipy import integrate

from simlens.cosmology import ARCSEC_PER_RADIAN, einstein_radius_sis, nfw_lens_parameters
from simlens.lensing.lens_equation import find_images
from simlens.lensing.mass import NFW, SIE, SIS, ConvergenceSheet, CoredIsothermal, ExternalShear, Multipole, PointMass, PowerLaw
from simlens.lensing.multiplane import MultiPlaneLens

POINTS = [(0.7, 0.3), (-0.4, 1.1), (1.6, -0.9), (0.05, -0.6)]


def homoeoidal_deflection(kappa_of_xi, q, x, y):
    """Deflection of a convergence constant on ellipses x^2 + y^2/q^2 = xi^2 (major axis along x),
    by the one-dimensional integrals of Keeton (2001, astro-ph/0102341, eqs. 2-4 after Schramm 1990):
    alpha_x = q x J0, alpha_y = q y J1, J_n = int_0^1 kappa(xi(u)) / (1 - (1 - q^2) u)^(n + 1/2) du,
    xi(u)^2 = u (x^2 + y^2 / (1 - (1 - q^2) u))."""
    def j(n):
        def integrand(u_):
            w = 1.0 - (1.0 - q * q) * u_
            return kappa_of_xi(math.sqrt(u_ * (x * x + y * y / w))) / w ** (n + 0.5)
        return integrate.quad(integrand, 0.0, 1.0, limit=200, epsabs=1e-12, epsrel=1e-10)[0]
    return q * x * j(0), q * y * j(1)


def test_homoeoidal_integrals_reproduce_the_sie():
    # Control for the method: the SIE (closed form tested against KSB94 elsewhere).
    q, theta_e = 0.6, 1.3
    sie = SIE(einstein_radius=theta_e, q=q)

    def kappa(xi):  # kappa = (theta_E/2) sqrt(q) / (q xi) with R = q xi
        return 0.5 * theta_e * math.sqrt(q) / max(q * xi, 1e-300)

    for x, y in POINTS:
        np.testing.assert_allclose(homoeoidal_deflection(kappa, q, x, y), np.ravel(sie.deflection(x, y)), rtol=1e-6)


@pytest.mark.parametrize("slope, q", [(1.7, 0.5), (2.0, 0.8), (2.4, 0.3), (2.9, 0.95)])
def test_power_law_deflection_matches_numerical_integration_of_kappa(slope, q):
    lens = PowerLaw(einstein_radius=1.1, slope=slope, q=q)
    t, b = slope - 1.0, 1.1 * math.sqrt(q)

    def kappa(xi):
        return (2.0 - t) / 2.0 * (b / max(q * xi, 1e-300)) ** t

    for x, y in POINTS:
        np.testing.assert_allclose(homoeoidal_deflection(kappa, q, x, y), np.ravel(lens.deflection(x, y)), rtol=1e-6)


@pytest.mark.parametrize("q, angle", [(0.4, 0.0), (0.75, 33.0), (1.0, 0.0)])
def test_power_law_at_isothermal_slope_is_the_sie(q, angle):
    # Tessore & Metcalf (2015): t = 1 is the SIE.
    x, y = np.array(POINTS).T
    np.testing.assert_allclose(np.array(PowerLaw(einstein_radius=1.3, slope=2.0, q=q, angle=angle).deflection(x, y)),
                               np.array(SIE(einstein_radius=1.3, q=q, angle=angle).deflection(x, y)), atol=1e-12)


def test_nfw_deflection_equals_enclosed_projected_mass():
    # Circular symmetry: alpha(r) = (2 / r) int_0^r kappa(r') r' dr' (SEF 1992, eq. 8.3), with kappa
    # integrated numerically from the projected NFW profile.
    halo = NFW(kappa_s=0.3, scale_radius=2.0)
    for r in (0.1, 0.9, 2.0, 2.0001, 5.0, 20.0):
        enclosed = integrate.quad(lambda s: float(halo.convergence(s, 0.0)) * s, 0, r, limit=300, points=[2.0] if r > 2 else None)[0]
        assert float(halo.deflection(r, 0.0)[0]) == pytest.approx(2.0 * enclosed / r, rel=1e-7)


def test_elliptical_nfw_reduces_to_spherical_and_keeps_its_axes():
    sph, ell = NFW(kappa_s=0.3, scale_radius=2.0), NFW(kappa_s=0.3, scale_radius=2.0, ellipticity=0.15, angle=90.0)
    assert np.allclose(NFW(kappa_s=0.3, scale_radius=2.0, ellipticity=0.0, angle=40).deflection(1.0, 0.5),
                       sph.deflection(1.0, 0.5))
    # Major axis of the potential along +y (angle 90): more convergence along y than x at equal radius.
    assert ell.convergence(0.0, 1.5) > ell.convergence(1.5, 0.0)


def test_nfw_parameters_hold_m200_within_r200():
    # M(< r) of the 3D NFW profile: 4 pi rho_s r_s^3 (ln(1 + x) - x / (1 + x)) (NFW 1997); at r200 it
    # must equal M200, and the mean density inside r200 is 200 rho_crit.  Recomputed here from
    # kappa_s and theta_s with Sigma_cr from astropy constants.
    m200, c, z_l, z_s = 2e13, 6.0, 0.35, 1.8
    kappa_s, theta_s = nfw_lens_parameters(m200, c, z_l, z_s, Planck18)
    d_l = Planck18.angular_diameter_distance(z_l)
    d_s = Planck18.angular_diameter_distance(z_s)
    d_ls = (Planck18.comoving_transverse_distance(z_s) - Planck18.comoving_transverse_distance(z_l)) / (1 + z_s)
    sigma_cr = constants.c**2 * d_s / (4 * math.pi * constants.G * d_l * d_ls)
    r_s = theta_s / ARCSEC_PER_RADIAN * d_l
    rho_s = kappa_s * sigma_cr / r_s
    mass = 4 * math.pi * rho_s * r_s**3 * (math.log(1 + c) - c / (1 + c))
    assert mass.to_value(u.M_sun) == pytest.approx(m200, rel=1e-6)
    r200 = c * r_s
    mean_density = mass / (4 / 3 * math.pi * r200**3)
    assert (mean_density / Planck18.critical_density(z_l)).decompose().value == pytest.approx(200.0, rel=1e-6)


def test_cored_isothermal_circular_closed_form_and_singular_limit():
    # Circular softened isothermal: alpha(r) = b (sqrt(s^2 + r^2) - s) / r (e.g. Keeton 2001).
    lens = CoredIsothermal(einstein_radius=1.2, core_radius=0.2)
    for r in (0.05, 0.5, 2.0):
        assert float(lens.deflection(r, 0.0)[0]) == pytest.approx(1.2 * (math.hypot(0.2, r) - 0.2) / r, rel=1e-12)
    x, y = np.array(POINTS).T
    np.testing.assert_allclose(np.array(CoredIsothermal(einstein_radius=1.2, core_radius=1e-10, q=0.6, angle=20).deflection(x, y)),
                               np.array(SIE(einstein_radius=1.2, q=0.6, angle=20).deflection(x, y)), atol=1e-8)


def test_multipole_convergence_definition():
    m = Multipole(order=4, strength=0.05, einstein_radius=1.0, angle=30.0)
    r, phi = 1.5, math.radians(50.0)
    assert float(m.convergence(r * math.cos(phi), r * math.sin(phi))) == pytest.approx(
        0.5 * 0.05 / r * math.cos(4 * (phi - math.radians(30.0))))


def test_mass_sheet_transformation_leaves_image_positions_unchanged():
    # kappa -> lambda kappa + (1 - lambda) with beta -> lambda beta keeps every image position and
    # scales magnifications by 1 / lambda^2 (Falco, Gorenstein & Shapiro 1985; SEF 1992, sect. 5.2).
    lam = 0.8
    lens = SIE(einstein_radius=1.2, q=0.7, angle=20.0) + ExternalShear(gamma=0.05, angle=70.0)
    transformed = (SIE(einstein_radius=lam * 1.2, q=0.7, angle=20.0) + ExternalShear(gamma=lam * 0.05, angle=70.0)
                   + ConvergenceSheet(kappa=1 - lam))
    windows = [(3.0, 0.02), (0.3, 0.003)]
    a = find_images(lens, 0.05, 0.03, windows)
    b = find_images(transformed, lam * 0.05, lam * 0.03, windows)
    assert len(a) == len(b) == 4
    order_a, order_b = np.lexsort((a.y, a.x)), np.lexsort((b.y, b.x))
    np.testing.assert_allclose(a.x[order_a], b.x[order_b], atol=1e-7)
    np.testing.assert_allclose(a.y[order_a], b.y[order_b], atol=1e-7)
    np.testing.assert_allclose(b.magnification[order_b], a.magnification[order_a] / lam**2, rtol=1e-4)


# -- light bending from the refractive index n = 1 - 2 Phi / c^2 -------------------------------------
# In the weak-field limit light crosses a mass as through a medium of index n = 1 - 2 Phi / c^2, so a
# ray with impact parameter xi is bent by alpha_hat = int grad_perp(2 Phi / c^2) dz along the
# unperturbed straight line (SEF 1992, sect. 3.1).  These tests integrate that numerically through 3D
# mass distributions and compare with the 2D models' deflections, checking projection and
# normalisation from first principles.  Units: G = c = 1 and the lens plane at D_l = 1 (so angles in
# radians equal lengths), with D_s = 2.0, D_ls = 1.3 (any positive values would do).

D_L, D_S, D_LS = 1.0, 2.0, 1.3


def bending_angle(dphi_dr, xi):
    """alpha_hat(xi) = 2 int_{-inf}^{inf} dPhi/dr (xi / r) dz, r = sqrt(xi^2 + z^2)."""
    def integrand(z):
        r = math.hypot(xi, z)
        return dphi_dr(r) * xi / r
    return 2.0 * 2.0 * integrate.quad(integrand, 0.0, np.inf, limit=400, epsabs=0, epsrel=1e-10)[0]


def test_point_mass_from_the_refractive_index():
    mass = 3e-3
    theta_e = math.sqrt(4 * mass * D_LS / (D_L * D_S))  # SEF 1992 eq. 8.29, radians (= lengths here)
    lens = PointMass(einstein_radius=theta_e)
    for xi in (0.01, 0.2, 1.5):
        expected = D_LS / D_S * bending_angle(lambda r: mass / r**2, xi)  # Phi = -M / r
        assert float(lens.deflection(xi, 0.0)[0]) == pytest.approx(expected, rel=1e-8)


def test_sis_einstein_radius_from_the_refractive_index():
    # rho = sigma^2 / (2 pi G r^2) has Phi = 2 sigma^2 ln r; the bending angle is the same at every xi,
    # 4 pi sigma^2 / c^2, and scaled by D_ls / D_s it is the Einstein radius of einstein_radius_sis.
    sigma = 250.0 / constants.c.to_value(u.km / u.s)
    for xi in (0.01, 0.5, 3.0):
        alpha_hat = bending_angle(lambda r: 2 * sigma**2 / r, xi)
        assert alpha_hat == pytest.approx(4 * math.pi * sigma**2, rel=1e-8)
    z_l, z_s = 0.4, 1.7
    d_ls = (Planck18.comoving_transverse_distance(z_s) - Planck18.comoving_transverse_distance(z_l)) / (1 + z_s)
    ratio = (d_ls / Planck18.angular_diameter_distance(z_s)).decompose().value
    theta_e = einstein_radius_sis(250.0, z_l, z_s, Planck18)
    assert theta_e == pytest.approx(ratio * 4 * math.pi * sigma**2 * ARCSEC_PER_RADIAN, rel=1e-6)
    ax, ay = SIS(einstein_radius=theta_e).deflection(0.3, 0.4)
    assert float(np.hypot(ax, ay)) == pytest.approx(theta_e)


@pytest.mark.parametrize("xi", [0.05, 0.6, 1.5, 1.5001, 4.0, 15.0])
def test_nfw_from_the_refractive_index(xi):
    # 3D NFW: rho = rho_s / (x (1 + x)^2), Phi = -4 pi G rho_s r_s^3 ln(1 + r / r_s) / r (NFW 1997).
    rho_s, r_s = 0.05, 1.5
    sigma_cr = D_S / (4 * math.pi * D_L * D_LS)  # c^2 D_s / (4 pi G D_l D_ls)
    lens = NFW(kappa_s=rho_s * r_s / sigma_cr, scale_radius=r_s / D_L)
    k = 4 * math.pi * rho_s * r_s**3

    def dphi_dr(r):
        return k * (math.log1p(r / r_s) / r**2 - 1.0 / (r * (r + r_s)))

    expected = D_LS / D_S * bending_angle(dphi_dr, xi)
    assert float(lens.deflection(xi, 0.0)[0]) == pytest.approx(expected, rel=1e-7)


# -- multi-plane --------------------------------------------------------------------------------------
def test_multiplane_with_one_plane_is_single_plane():
    lens = SIE(einstein_radius=1.1, q=0.7, angle=20.0) + ExternalShear(gamma=0.04, angle=100.0)
    multi = MultiPlaneLens(planes=(lens,), redshifts=(0.5,), z_source=2.0, cosmology=Planck18)
    x, y = np.array(POINTS).T
    np.testing.assert_allclose(np.array(multi.ray_shoot(x, y)), np.array(lens.ray_shoot(x, y)), atol=1e-14)
    # The SIE's Hessian is analytic, the multi-plane one differenced (step 1e-4 arcsec): they agree
    # to the differencing error.
    np.testing.assert_allclose(multi.magnification(x, y), lens.magnification(x, y), rtol=1e-6)


def test_two_planes_against_an_independent_calculation():
    # Two point masses at z1 < z2, each normalised for the source at z_s.  Independently: physical
    # deflections alpha_hat_i = (D_s / D_is) alpha_i; theta_2 = theta_1 - (D_12 / D_2) alpha_hat_1;
    # beta = theta_1 - (D_1s / D_s) alpha_hat_1 - (D_2s / D_s) alpha_hat_2(theta_2) (SEF 1992, eq. 9.7),
    # with flat-universe distances D_ij = (D_M(z_j) - D_M(z_i)) / (1 + z_j) (Hogg 1999, eq. 19).
    z1, z2, zs = 0.3, 0.9, 2.2
    p1, p2 = PointMass(einstein_radius=0.6), PointMass(einstein_radius=0.4, center=(0.3, -0.2))
    multi = MultiPlaneLens(planes=(p1, p2), redshifts=(z1, z2), z_source=zs, cosmology=Planck18)

    def dm(z):
        return Planck18.comoving_transverse_distance(z).to_value(u.Mpc)

    def d(za, zb):
        return (dm(zb) - dm(za)) / (1 + zb)

    theta = np.array([0.45, 0.35])
    a1 = np.ravel(p1.deflection(*theta)) * d(0, zs) / d(z1, zs)
    theta2 = theta - d(z1, z2) / d(0, z2) * a1
    a2 = np.ravel(p2.deflection(*theta2)) * d(0, zs) / d(z2, zs)
    beta = theta - d(z1, zs) / d(0, zs) * a1 - d(z2, zs) / d(0, zs) * a2
    np.testing.assert_allclose(np.ravel(multi.ray_shoot(*theta)), beta, rtol=1e-6)
    # The second plane sees a deflected ray: moving it changes beta differently from a single plane.
    single = np.ravel((p1 + p2).ray_shoot(*theta))
    assert np.abs(single - beta).max() > 1e-3


def test_multiplane_rejects_misordered_planes():
    with pytest.raises(ValueError):
        MultiPlaneLens(planes=(SIS(einstein_radius=1.0), SIS(einstein_radius=1.0)), redshifts=(0.8, 0.5),
                       z_source=2.0, cosmology=Planck18)
    with pytest.raises(TypeError):
        MultiPlaneLens(planes=(SIS(einstein_radius=1.0),), redshifts=(0.5,), z_source=2.0, cosmology=Planck18).potential(1.0, 0.0)


@pytest.mark.parametrize("n", [1.0, 4.0])
def test_sersic_mass_deflection_equals_enclosed_mass(n):
    # Circular Sersic: alpha(r) = M(<r) / (pi r) in convergence units, with M(<r) from the regularised
    # incomplete gamma function (Graham & Driver 2005, eq. 2); to 1e-8.
    from simlens.lensing.mass import SersicMass

    stars = SersicMass(kappa_e=0.6, half_light_radius=0.8, sersic_index=n)
    r = np.array([0.01, 0.2, 0.8, 3.0, 10.0])
    np.testing.assert_allclose(stars.deflection(r, 0 * r)[0], stars.enclosed_mass_circular(r) / (math.pi * r), rtol=1e-8)


def test_sersic_mass_follows_the_light():
    from simlens.imaging.light import Sersic
    from simlens.lensing.mass import SersicMass

    light = Sersic(flux=5e4, half_light_radius=0.7, sersic_index=4.0, q=0.6, angle=35.0, center=(0.1, 0.0))
    stars = SersicMass.from_light(light, mass_to_light=2.0, sigma_cr_counts=3e4)
    x, y = np.array(POINTS).T
    np.testing.assert_allclose(stars.convergence(x, y), 2.0 * light.surface_brightness(x, y) / 3e4, rtol=1e-12)


def test_truncated_sis_has_finite_mass():
    # Pseudo-Jaffe: total mass pi b a (convergence units), so far away it deflects like a point mass
    # of Einstein radius sqrt(b a) (Keeton 2001, sect. 3.3); near the centre like the SIS.
    from simlens.lensing.mass import TruncatedSIS

    sub = TruncatedSIS(einstein_radius=0.1, truncation_radius=0.5)
    far = float(sub.deflection(200.0, 0.0)[0])
    assert far == pytest.approx(0.1 * 0.5 / 200.0, rel=1e-2)
    assert float(sub.deflection(1e-4, 0.0)[0]) == pytest.approx(0.1, rel=1e-3)
    enclosed = integrate.quad(lambda r: float(sub.convergence(r, 0.0)) * 2 * math.pi * r, 0, np.inf, limit=400)[0]
    assert enclosed == pytest.approx(math.pi * 0.1 * 0.5, rel=1e-6)


@pytest.mark.parametrize("n, q", [(4.0, 0.7), (1.0, 0.4), (0.5, 0.3), (6.0, 0.6), (1.0, 1.0)])
def test_tabulated_sersic_deflection_matches_the_quadrature(n, q):
    # The interpolation table (used for large ray arrays) against the homoeoidal quadrature itself
    # (Keeton 2001 integrals), from the centre to beyond the table's reach (100 R_e).
    from simlens.lensing.mass import SersicMass
    from simlens.lensing.mass.base import rotate_back, rotate_into_frame
    from simlens.lensing.mass.sersic_mass import TABLE_ABOVE

    mass = SersicMass(kappa_e=0.3, half_light_radius=1.2, sersic_index=n, q=q, angle=25.0, center=(0.1, -0.05))
    rng = np.random.default_rng(7)
    x, y = rng.uniform(-8, 8, (2, TABLE_ABOVE + 1000))
    x[:300] *= 1e-3
    y[:300] *= 1e-3
    x[-50:] *= 30.0  # beyond the table: quadrature
    ax, ay = mass.deflection(x, y)
    xp, yp, c, s = rotate_into_frame(x, y, mass.center, mass.angle)
    j0, j1 = mass._integrals(xp, yp)
    bx, by = rotate_back(q * xp * j0, q * yp * j1, c, s)
    error = np.hypot(ax - bx, ay - by) / np.hypot(bx, by)
    assert error.max() < 1e-4


def test_nfw_convergence_near_the_scale_radius_matches_a_40_digit_evaluation():
    # Bartelmann (1996) kappa(x) = 2 kappa_s (1 - F(x)) / (x^2 - 1), F = arccosh(1/x)/sqrt(1 - x^2)
    # (x < 1), arccos(1/x)/sqrt(x^2 - 1) (x > 1), evaluated by mpmath at 40 digits; the float
    # formula loses 1e-5 relative within 1e-3 of x = 1, the series must not (1e-12 here).
    import mpmath

    mpmath.mp.dps = 40

    def reference(x):
        x = mpmath.mpf(x)
        if x == 1:
            return mpmath.mpf(2) / 3
        f = mpmath.acosh(1 / x) / mpmath.sqrt(1 - x * x) if x < 1 else mpmath.acos(1 / x) / mpmath.sqrt(x * x - 1)
        return 2 * (1 - f) / (x * x - 1)

    halo = NFW(kappa_s=1.0, scale_radius=1.0)
    offsets = np.concatenate([-np.logspace(-10, -3, 60), [0.0], np.logspace(-10, -3, 60),
                              [-0.06, -0.0488, 0.0488, 0.06]])  # and both sides of the series' edge
    x = 1.0 + offsets
    kappa = halo.convergence(x, np.zeros_like(x))
    worst = max(abs(float(k) / float(reference(v)) - 1.0) for k, v in zip(kappa, x))
    assert worst < 1e-12, worst
