"""Blackbody quantities, unit conversions, expansion history, recombination and last scattering.

Everything that needs an expansion history takes any :mod:`astropy.cosmology`
instance (default: astropy's bundled ``Planck18``); what astropy lacks (helium
fraction, recombination settings, primordial amplitude and tilt) lives in the
small immutable :class:`CosmologyExtras` object.

The implementation is split by concept, one module each (``blackbody``,
``bandpass``, ``motion``, ``parameters``, ``distances`` (the table),
``distance_functions`` (one call each), ``recombination`` (the equations),
``ionization_history`` (their tabulated solution), ``last_scattering_surface``);
this package only re-exports their public names.
"""

from cmbtools.physics import bandpass as _bandpass
from cmbtools.physics import blackbody as _blackbody
from cmbtools.physics import distance_functions as _distance_functions
from cmbtools.physics import distances as _distances
from cmbtools.physics import ionization_history as _ionization_history
from cmbtools.physics import last_scattering_surface as _last_scattering_surface
from cmbtools.physics import motion as _motion
from cmbtools.physics import parameters as _parameters
from cmbtools.physics import recombination as _recombination
from cmbtools.physics.bandpass import *  # noqa: F401,F403
from cmbtools.physics.blackbody import *  # noqa: F401,F403
from cmbtools.physics.distance_functions import *  # noqa: F401,F403
from cmbtools.physics.distances import *  # noqa: F401,F403
from cmbtools.physics.ionization_history import *  # noqa: F401,F403
from cmbtools.physics.last_scattering_surface import *  # noqa: F401,F403
from cmbtools.physics.motion import *  # noqa: F401,F403
from cmbtools.physics.parameters import *  # noqa: F401,F403
from cmbtools.physics.recombination import *  # noqa: F401,F403

__all__ = [
    *_blackbody.__all__,
    *_bandpass.__all__,
    *_motion.__all__,
    *_parameters.__all__,
    *_distances.__all__,
    *_distance_functions.__all__,
    *_recombination.__all__,
    *_ionization_history.__all__,
    *_last_scattering_surface.__all__,
]
