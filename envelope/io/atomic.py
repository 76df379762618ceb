"""Atomic output: write to a temporary sibling, rename into place on success, never half-write."""

from __future__ import annotations

import contextlib
import logging
import os
import re
import tempfile
from collections.abc import Iterator
from pathlib import Path

from envelope.errors import InputError, OutputExistsError

__all__ = ["atomic_output", "atomic_outputs", "check_distinct", "check_writable", "file_mode",
           "remove_stale_temporaries", "temporary_name_pattern"]

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
    path = Path(path)
    if path.exists() and not overwrite:
        raise OutputExistsError(f"{path}: file exists; add --overwrite to replace it")
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{path}: folder {parent} does not exist")
    return path


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
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}-", suffix=".part" + path.suffix,
                                    dir=path.parent if str(path.parent) else ".")
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
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


@contextlib.contextmanager
def atomic_outputs(paths, overwrite: bool = False) -> Iterator[list[Path]]:
    """Like :func:`atomic_output` for several files that must appear together or not at all."""
    paths = [check_writable(p, overwrite) for p in paths]
    with contextlib.ExitStack() as stack:
        tmps = [stack.enter_context(atomic_output(p, overwrite)) for p in paths]
        yield tmps
