"""Atomic output: write to a temporary sibling, rename into place on success, never half-write."""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import re
import tempfile
from collections.abc import Iterator
from pathlib import Path

from envelope.errors import EnvelopeError, FileSystemError, InputError, OutputExistsError, os_error_message

__all__ = ["atomic_output", "atomic_outputs", "check_distinct", "check_out_dir", "check_writable", "file_mode",
           "remove_empty_folder", "remove_stale_temporaries", "temporary_name_pattern"]

log = logging.getLogger(__name__)


def file_mode() -> int:
    """Permission bits of a new file under the process umask (0666 & ~umask), as ``open()`` would give."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def check_distinct(outputs: dict, inputs: dict | None = None) -> None:
    """Refuse two outputs on one path, or an output on an input, before any work.

    ``outputs`` and ``inputs`` map how the user named each file (a flag such as ``--out``)
    to its path; None values are skipped. The message names both flags and the path.
    """
    seen = {}
    for flag, path in (outputs or {}).items():
        if path is None:
            continue
        key = os.path.realpath(path)
        if key in seen:
            raise InputError(f"{flag} and {seen[key]} are the same file ({path}); give each output its own path")
        seen[key] = flag
    for flag, path in (inputs or {}).items():
        for p in ([path] if isinstance(path, (str, os.PathLike)) else list(path or [])):
            key = os.path.realpath(p)
            if key in seen:
                raise InputError(f"{seen[key]} {p} is also an input ({flag}); write the output elsewhere")


def check_writable(path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Refuse to replace an existing file unless ``overwrite``; check the folder exists.

    This is the single place where the refusal message is worded, so every command says
    the same thing.
    """
    given = os.fspath(path)
    if given.endswith(("/", os.sep)):
        raise InputError(f"{given}: names a folder (ends with {given[-1]!r}); expected a file name, "
                         f"e.g. {given}out{_example_suffix(given)}")
    path = Path(path)
    try:
        if path.is_symlink():
            os.path.realpath(path, strict=True)  # ELOOP for a link loop, ENOENT for a dangling link
        for part in path.parts:
            if len(os.fsencode(part)) > _name_max(path):
                raise OSError(errno.ENAMETOOLONG, os.strerror(errno.ENAMETOOLONG), given)
        exists = path.exists()
    except OSError as exc:
        raise FileSystemError(os_error_message(exc, given)) from None
    if exists and not overwrite:
        raise OutputExistsError(f"{path}: file exists; add --overwrite to replace it")
    if exists and path.is_dir():
        raise InputError(f"{path}: is a folder; expected a file name")
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{path}: folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise FileSystemError(f"{path}: folder {parent} is not writable; check its permissions or write elsewhere")
    return path


def check_out_dir(path: str | os.PathLike, option: str = "--out-dir") -> Path:
    """An output folder the command may create (with its missing parents): a folder, or a new
    path below an existing folder, with no file on the way.

    The single wording of these refusals for every command with an output folder.
    """
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise InputError(f"{option} {path}: exists and is not a folder")
    for above in path.absolute().parents:
        if above.exists():
            if not above.is_dir():
                raise InputError(f"{option} {path}: {above} is a file, not a folder")
            break
    return path


def _name_max(path: Path) -> int:
    """Longest file-name component the file system takes (255 bytes where it does not say)."""
    try:
        return os.pathconf(path.parent if str(path.parent) else ".", "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):
        return 255


def _example_suffix(given: str) -> str:
    return "".join(Path(given.rstrip("/" + os.sep)).suffixes) or ".tif"


def _named_for_user(exc: BaseException, tmp: Path, path: Path) -> BaseException | None:
    """The error to raise instead of ``exc`` raised while writing ``tmp``: it names ``path``, never ``tmp``.

    An operating-system error becomes a :class:`FileSystemError` ("<path>: no space left on the
    device ..."); one of ours that quotes the temporary name is re-worded with the user's.
    """
    if isinstance(exc, EnvelopeError) and str(tmp) in str(exc):
        return type(exc)(str(exc).replace(str(tmp), str(path)))
    if isinstance(exc, OSError) and not isinstance(exc, FileExistsError):
        if not isinstance(exc.errno, int) and _nearly_full(path):
            # GDAL reports a failed write without an errno; a full disk is the usual cause
            exc = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        if isinstance(exc.errno, int):
            return FileSystemError(os_error_message(exc, path) + "; nothing was written")
        return FileSystemError(f"{path}: cannot write ({str(exc).replace(str(tmp), str(path))}); nothing was written")
    return None


def _nearly_full(path: Path) -> bool:
    import shutil

    try:
        return shutil.disk_usage(path.parent if str(path.parent) else ".").free < 1 << 20
    except OSError:
        return False


def temporary_name_pattern(path: Path) -> re.Pattern:
    """Names of the temporary files :func:`atomic_output` makes for ``path``.

    ``.<name>.<pid>-<random>.part<suffix>``, and anything a writer derives from such a name
    (a GeoTIFF's staging file ``….part.tif.stage.tif`` and its ``.aux.xml``). The process id
    says whose file it is, so a later writer of the same path can tell a stale file (its
    process is gone, e.g. killed) from one a running process is still writing.
    """
    return re.compile(rf"^\.{re.escape(path.name)}\.(?P<pid>\d+)-[A-Za-z0-9_]+\.part")


def _process_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # another user's live process
    return True


def remove_stale_temporaries(path: str | os.PathLike) -> list[Path]:
    """Remove temporary files of ``path`` left by writers that no longer run; return them.

    A writer killed hard (SIGKILL, power cut) cannot delete its temporary files; the next
    command that writes the same path removes them here. Files of live processes are kept.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    pattern = temporary_name_pattern(path)
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        m = pattern.match(entry.name)
        if m and not _process_alive(int(m["pid"])) and entry.is_file(follow_symlinks=False):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
    if removed:
        log.info("%s: removed %d stale temporary file(s) of an earlier, interrupted write", path, len(removed))
    return removed


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike, overwrite: bool = False) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it onto ``path``.

    On any exception (including KeyboardInterrupt) the temporary file is removed and
    ``path`` is left exactly as it was. Temporary files of ``path`` left by an earlier
    writer that was killed are removed first (:func:`remove_stale_temporaries`).

    Examples
    --------
    >>> with atomic_output("out.json", overwrite=True) as tmp:   # doctest: +SKIP
    ...     tmp.write_text("{}")
    """
    path = check_writable(path, overwrite)
    remove_stale_temporaries(path)
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}-", suffix=".part" + path.suffix,
                                        dir=path.parent if str(path.parent) else ".")
    except OSError as exc:
        raise FileSystemError(os_error_message(exc, path)) from None
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        yield tmp
        # re-check: another process may have created the target meanwhile
        if path.exists() and not overwrite:
            raise OutputExistsError(f"{path}: file exists; add --overwrite to replace it")
        if tmp.exists():
            os.chmod(tmp, file_mode())  # mkstemp makes 0600; outputs follow the user's umask
        os.replace(tmp, path)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            tmp.unlink()
        better = _named_for_user(exc, tmp, path)
        if better is None:
            raise
        raise better from exc


@contextlib.contextmanager
def atomic_outputs(paths, overwrite: bool = False) -> Iterator[list[Path]]:
    """Like :func:`atomic_output` for several files that must appear together or not at all."""
    paths = [check_writable(p, overwrite) for p in paths]
    with contextlib.ExitStack() as stack:
        tmps = [stack.enter_context(atomic_output(p, overwrite)) for p in paths]
        yield tmps


def remove_empty_folder(path) -> bool:
    """Remove the folder ``path`` if it holds no file at any depth (only empty folders); True if removed.

    For a command that created an output folder and then failed before writing anything into it.
    """
    path = Path(path)
    if path.is_symlink() or not path.is_dir():
        return False
    folders = []
    for root, dirs, files in os.walk(path, topdown=False):
        if files or any(Path(root, d).is_symlink() for d in dirs):
            return False
        folders.append(root)
    for root in folders:  # deepest first
        with contextlib.suppress(OSError):
            os.rmdir(root)
    return not path.exists()
