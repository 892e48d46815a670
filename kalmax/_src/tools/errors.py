"""The error classes of the tool wing; the command line maps each to an exit code.

Kept in a module of their own so that every tool module can raise them and
the command line can catch them without importing the modules that raise.
"""


class UsageError(Exception):
    """A command-line or settings combination that cannot be used (exit code 2)."""


class DataError(Exception):
    """A measurement table cannot be read or does not fit the request (exit code 3)."""


class ModelFileError(Exception):
    """A model file cannot be read, is from another format version, or is invalid (exit code 4)."""


class FitError(Exception):
    """Fitting or smoothing failed numerically: non-finite loss or states (exit code 5)."""
