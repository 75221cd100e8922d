"""Deflectors (mass models) of simlens.

Every model is an immutable object with ``deflection(x, y) -> (alpha_x, alpha_y)``,
``convergence(x, y)`` and ``potential(x, y)`` on numpy arrays of image-plane positions in arcsec;
``a + b`` is the composite lens, and ``ray_shoot``, ``hessian``, ``magnification`` are shared by all
models.  See :mod:`simlens.mass.base` for the conventions.

>>> from simlens.mass import SIE, ExternalShear
>>> lens = SIE(einstein_radius=1.2, q=0.7, angle=30) + ExternalShear(gamma=0.05, angle=100)
>>> ax, ay = lens.deflection([1.0], [0.5])
"""

from .base import CompositeMass, MassModel
from .cored_isothermal import CoredIsothermal
from .isothermal import SIE, SIS
from .multipole import Multipole
from .nfw import NFW
from .point_mass import PointMass
from .power_law import PowerLaw
from .scaled import ScaledDeflector
from .sersic_mass import SersicMass
from .sheets import ConvergenceSheet, ExternalShear
from .truncated_isothermal import TruncatedSIS

__all__ = ["MassModel", "CompositeMass", "SIS", "SIE", "PowerLaw", "CoredIsothermal", "NFW", "Multipole",
           "SersicMass", "TruncatedSIS", "PointMass", "ExternalShear", "ConvergenceSheet", "ScaledDeflector"]
