"""cmbtools: angular power spectra of CMB temperature maps on the HEALPix sphere.

Public modules
--------------
cmbtools.maps      read/write HEALPix maps, masks, apodization, monopole/dipole
cmbtools.spectrum  masked-sky pseudo-Cl with mode-coupling correction, bandpowers, errors
cmbtools.physics   blackbody quantities, distances, recombination, last-scattering geometry
cmbtools.simulate  Gaussian skies, noise, fiducial spectrum, Monte Carlo validation
cmbtools.cli       the ``cmbtools`` command-line tool

Submodules are imported on first access, so ``import cmbtools`` stays cheap.
"""

import importlib

from cmbtools._version import __version__
from cmbtools import exceptions

__all__ = ["__version__", "exceptions", "maps", "spectrum", "physics", "simulate"]

_SUBMODULES = {"maps", "spectrum", "physics", "simulate", "cli"}


def __getattr__(name):
    if name in _SUBMODULES:
        module = importlib.import_module(f".{name}", __name__)
        globals()[name] = module
        return module
    raise AttributeError(f"module 'cmbtools' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | _SUBMODULES)
