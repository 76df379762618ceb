"""Atomic output: write to a temporary sibling, rename into place on success, never half-write."""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

from envelope.errors import InputError, OutputExistsError


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


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike, overwrite: bool = False) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it onto ``path``.

    On any exception (including KeyboardInterrupt) the temporary file is removed and
    ``path`` is left exactly as it was.

    Examples
    --------
    >>> with atomic_output("out.json", overwrite=True) as tmp:   # doctest: +SKIP
    ...     tmp.write_text("{}")
    """
    path = check_writable(path, overwrite)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part" + path.suffix,
                                    dir=path.parent if str(path.parent) else ".")
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        yield tmp
        # re-check: another process may have created the target meanwhile
        if path.exists() and not overwrite:
            raise OutputExistsError(f"{path}: file exists; add --overwrite to replace it")
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
