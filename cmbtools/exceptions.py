"""Exceptions and warnings raised by cmbtools.

Every error that cmbtools raises on purpose is a :class:`CmbtoolsError`.  Each
concrete class also derives from the built-in exception that a caller would
naturally catch (``ValueError`` for bad values, ``OSError`` for files), so
existing ``except`` clauses keep working.  The command-line tool turns any
:class:`CmbtoolsError` into one line on standard error and exit status 2.
"""

from __future__ import annotations

__all__ = [
    "CmbtoolsError",
    "InvalidInputError",
    "InputFileError",
    "ResolutionMismatchError",
    "IllConditionedError",
    "OutputExistsError",
    "OutputPathError",
    "CacheError",
    "MemoryLimitError",
    "WorkerLostError",
    "CmbtoolsWarning",
]


class CmbtoolsError(Exception):
    """Base class of every error cmbtools raises on purpose."""


class InvalidInputError(CmbtoolsError, ValueError):
    """An argument or an array has a value the computation cannot accept."""


class InputFileError(CmbtoolsError, ValueError):
    """An input file is missing, unreadable or not in the expected format.

    Parameters
    ----------
    path : str or path-like
        The file concerned.
    problem : str
        What is wrong with it; the message is ``"<path>: <problem>"``.

    Attributes
    ----------
    path : str
        The file concerned.
    problem : str
        What is wrong with it.
    """

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


class ResolutionMismatchError(InvalidInputError):
    """Two maps (or a map and a mask) have different nside.

    Parameters
    ----------
    message : str
        The error message.
    nside_a, nside_b : int
        The two resolutions.

    Attributes
    ----------
    nside_a, nside_b : int
        The two resolutions.
    """

    def __init__(self, message, nside_a, nside_b):
        self.nside_a = nside_a
        self.nside_b = nside_b
        super().__init__(message)


class IllConditionedError(CmbtoolsError, ValueError):
    """A matrix that must be inverted is singular or too ill-conditioned.

    Parameters
    ----------
    message : str
        The error message.
    condition_number : float
        The 2-norm condition number of the matrix (``inf`` when singular).

    Attributes
    ----------
    condition_number : float
        The 2-norm condition number of the matrix (``inf`` when singular).
    """

    def __init__(self, message, condition_number):
        self.condition_number = float(condition_number)
        super().__init__(message)


class OutputExistsError(CmbtoolsError, FileExistsError):
    """An output file exists and overwriting was not allowed.

    Parameters
    ----------
    path : str or path-like
        The existing file.

    Attributes
    ----------
    path : str
        The existing file.
    """

    def __init__(self, path):
        self.path = str(path)
        super().__init__(f"{self.path}: output exists; pass overwrite=True (CLI: --overwrite) to replace it")


class OutputPathError(CmbtoolsError, OSError):
    """An output path cannot be written (missing or read-only directory, ...).

    Parameters
    ----------
    path : str or path-like
        The output path.
    problem : str
        Why it cannot be written; the message is ``"<path>: <problem>"``.

    Attributes
    ----------
    path : str
        The output path.
    problem : str
        Why it cannot be written.
    """

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


class CacheError(CmbtoolsError, ValueError):
    """A cached file is stale (built from other inputs) or corrupt."""


class MemoryLimitError(CmbtoolsError, MemoryError):
    """A computation would need more memory than the machine has.

    Parameters
    ----------
    message : str
        The error message (what, how much, how to go ahead anyway).
    required_bytes, available_bytes : int
        The estimate and what the machine offers.

    Attributes
    ----------
    required_bytes, available_bytes : int
        The estimate and what the machine offers.
    """

    def __init__(self, message, required_bytes, available_bytes):
        self.required_bytes = int(required_bytes)
        self.available_bytes = int(available_bytes)
        super().__init__(message)


class WorkerLostError(CmbtoolsError, RuntimeError):
    """Worker processes of a simulation run kept dying, or a user-supplied executor broke.

    The simulations finished before the failure are saved in the run
    directory; running the same call again resumes from them.

    Parameters
    ----------
    message : str
        The error message.
    n_finished, n_sims : int
        Simulations saved so far and simulations requested.

    Attributes
    ----------
    n_finished, n_sims : int
        Simulations saved so far and simulations requested.
    """

    def __init__(self, message, n_finished, n_sims):
        self.n_finished = int(n_finished)
        self.n_sims = int(n_sims)
        super().__init__(message)


class CmbtoolsWarning(UserWarning):
    """A legal but suspicious input or setting (small sky fraction, lmax beyond the beam, ...)."""
