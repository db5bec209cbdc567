"""Blackbody quantities, unit conversions, expansion history, recombination and last scattering.

Everything that needs an expansion history takes any :mod:`astropy.cosmology`
instance (default: astropy's bundled ``Planck18``); what astropy lacks (helium
fraction, recombination settings, primordial amplitude and tilt) lives in the
small immutable :class:`CosmologyExtras` object.

The implementation is split by concept into private modules; this module only
re-exports their public names.
"""

from __future__ import annotations

from . import _blackbody, _distances, _recombination
from ._blackbody import *  # noqa: F401,F403
from ._distances import *  # noqa: F401,F403
from ._recombination import *  # noqa: F401,F403

__all__ = [*_blackbody.__all__, *_distances.__all__, *_recombination.__all__]
