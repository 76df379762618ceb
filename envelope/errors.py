"""The one error family of the library; the CLI turns each into one line and exit status 2."""


class EnvelopeError(Exception):
    """Base class of every error the library raises on purpose."""


class InputError(EnvelopeError, ValueError):
    """A file, column, key or value is not what was expected.

    The message names the offending file/column/key, what was found and what was expected.
    """


class LayerError(InputError):
    """A fault in one named climate layer (``NAME=PATH[:BAND]``).

    ``layer`` is the layer (an :class:`envelope.io.layers.ClimateLayer`) and ``detail`` the
    fault without the layer's name, so a caller can name the layer its own way (a study key).
    """

    def __init__(self, message, layer=None, detail=None):
        super().__init__(message)
        self.layer = layer
        self.detail = message if detail is None else detail


class GridMismatchError(InputError):
    """Two grids that must share CRS, transform and shape do not; the message names the first difference."""


class ModelError(EnvelopeError):
    """A model is not fitted, or a model file is foreign, tampered with or of an unknown version."""


class LayerGridMismatchError(LayerError, GridMismatchError):
    """A named climate layer is not on the grid of the first one."""


class OutputExistsError(InputError):
    """An output file exists and overwriting was not asked for."""


class FileSystemError(EnvelopeError):
    """The operating system refused a file operation (a read-only folder, a full disk, a name too long,
    a symbolic-link loop); the message names the path the user gave and what to do."""


# errno -> (what happened, the likely fix), for one-line messages
_OS_REASONS = {
    "EACCES": ("permission denied", "check the folder's permissions or choose another path"),
    "EPERM": ("operation not permitted", "check the folder's permissions or choose another path"),
    "EROFS": ("read-only file system", "write to a writable folder"),
    "ENOSPC": ("no space left on the device", "free some space or write elsewhere"),
    "EDQUOT": ("disk quota exceeded", "free some space or write elsewhere"),
    "EFBIG": ("file too large for the file system", "write to another file system"),
    "ENAMETOOLONG": ("file name too long", "use a shorter name (at most 255 bytes per path component)"),
    "ELOOP": ("symbolic-link loop", "point the link at a real file or give another path"),
    "ENOENT": ("no such file or folder", "check the path"),
    "ENOTDIR": ("a part of the path is not a folder", "check the path"),
    "EISDIR": ("is a folder", "give a file name"),
    "EEXIST": ("already exists", "choose another path"),
    "EMFILE": ("too many open files", "raise the open-file limit (ulimit -n)"),
    "EIO": ("input/output error", "check the disk"),
}


def os_error_message(exc: OSError, path=None) -> str:
    """One line for an operating-system error: ``"<path>: <what happened>; <likely fix>"``.

    ``path`` (the path the user gave) replaces the one the error carries, which may be a
    temporary name.
    """
    import errno as _errno
    import os as _os

    name = _errno.errorcode.get(exc.errno, "") if isinstance(exc.errno, int) else ""
    where = path if path is not None else exc.filename
    where = _os.fsdecode(where) if isinstance(where, (str, bytes, _os.PathLike)) else None
    if name in _OS_REASONS:
        reason, fix = _OS_REASONS[name]
    elif exc.strerror:
        reason, fix = exc.strerror[:1].lower() + exc.strerror[1:], ""
    else:  # no errno (e.g. a library's own OSError subclass): its message already says what happened
        return f"{where}: {exc}" if where and where not in str(exc) else (str(exc) or type(exc).__name__)
    return f"{where or 'file system'}: {reason}{f' ({name})' if name else ''}" + (f"; {fix}" if fix else "")
