"""``simlens.mass``: the mass models, kept under this short name for scripts and notebooks.

They live in :mod:`simlens.lensing.mass` (one profile a module); this module re-exports them.
"""

from .lensing.mass import *  # noqa: F401,F403
from .lensing.mass import __all__  # noqa: F401
