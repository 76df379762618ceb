"""The one error family of the library; the CLI turns each into one line and exit status 2."""


class EnvelopeError(Exception):
    """Base class of every error the library raises on purpose."""


class InputError(EnvelopeError, ValueError):
    """A file, column, key or value is not what was expected.

    The message names the offending file/column/key, what was found and what was expected.
    """


class GridMismatchError(InputError):
    """Two grids that must share CRS, transform and shape do not; the message names the first difference."""


class ModelError(EnvelopeError):
    """A model is not fitted, or a model file is foreign, tampered with or of an unknown version."""


class OutputExistsError(InputError):
    """An output file exists and overwriting was not asked for."""
