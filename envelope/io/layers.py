"""Climate layers by name: ``NAME=PATH[:BAND]`` specifications, layer tables and study-file layer tables."""

from __future__ import annotations

import csv
import os
import re
from dataclasses import dataclass
from pathlib import Path

from envelope.errors import InputError

__all__ = ["LAYER_TABLE_COLUMNS", "ClimateLayer", "check_layer_name", "parse_layer", "read_layer_table"]

#: Columns of a layer table (``--layers LAYERS.csv``); ``band`` is optional.
LAYER_TABLE_COLUMNS = ("name", "path", "band")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_.\-]*$")


@dataclass(frozen=True)
class ClimateLayer:
    """One climate variable named by the user: a raster file and, for a multi-band file, its band.

    ``band`` is a 1-based band number or a band description (GeoTIFF), or a variable name
    (NetCDF); None when the file holds one layer. The layer is a path-like object (its
    ``os.fspath`` is the file), so provenance and output checks treat it as its file; it
    prints as ``NAME=PATH[:BAND]``.
    """

    name: str
    path: Path
    band: int | str | None = None

    def __fspath__(self) -> str:
        return os.fspath(self.path)

    def __str__(self) -> str:
        return f"{self.name}={self.path}" + ("" if self.band is None else f":{self.band}")


def _band(value, where):
    text = str(value).strip()
    if not text:
        return None
    if text.isdigit():
        band = int(text)
        if band < 1:
            raise InputError(f"{where}: band {text}; expected a band number from 1, or a band name")
        return band
    return text


def check_layer_name(name: str, where: str) -> str:
    if not _NAME.match(name or ""):
        raise InputError(f"{where}: layer name {name!r}; expected letters, digits, '_', '.' or '-', "
                         "starting with a letter (e.g. bio5)")
    return name


def parse_layer(text, *, where: str = "--climate", folder=None):
    """A ``--climate`` value: ``PATH`` (a path), or ``NAME=PATH`` / ``NAME=PATH:BAND`` (a :class:`ClimateLayer`).

    A value that names an existing file is taken as a path even if it holds ``=``.
    ``BAND`` is a 1-based number or a band name; it is split off at the last ``:`` only
    when the whole does not name a file. Relative paths are resolved against ``folder``
    when given.

    Examples
    --------
    >>> parse_layer("bio5=tmax_warmest.tif")           # doctest: +SKIP
    ClimateLayer(name='bio5', path=PosixPath('tmax_warmest.tif'), band=None)
    >>> parse_layer("bio12=chelsa_stack.tif:12")       # doctest: +SKIP
    """
    text = str(text).strip()

    def resolve(p):
        p = Path(p).expanduser()
        return p if folder is None or p.is_absolute() else Path(folder) / p

    if not text:
        raise InputError(f"{where}: empty value; expected PATH or NAME=PATH[:BAND]")
    if resolve(text).exists() or "=" not in text:
        return resolve(text)
    name, _, rest = text.partition("=")
    name = check_layer_name(name.strip(), f"{where} {text}")
    path, band = resolve(rest), None
    if not path.exists() and ":" in rest:
        head, _, tail = rest.rpartition(":")
        if resolve(head).exists():
            path, band = resolve(head), _band(tail, f"{where} {text}")
    if not path.is_file():
        raise InputError(f"{where} {text}: file {path} not found; expected NAME=PATH or NAME=PATH:BAND "
                         "naming a raster file")
    return ClimateLayer(name, path, band)


def read_layer_table(path) -> list[ClimateLayer]:
    """Read a layer table: CSV with columns ``name``, ``path`` and optionally ``band``.

    One row per climate variable; paths are relative to the table's folder unless absolute;
    names must be unique and every file must exist.

    Examples
    --------
    ``layers.csv``::

        name,path,band
        bio1,bio1_annual_mean.tif,
        bio12,precipitation_stack.tif,12
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"--layers {path}: layer table not found; expected a CSV with columns name,path[,band]")
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            header = [(h or "").strip() for h in (reader.fieldnames or [])]
            rows = [{(k or "").strip(): (v or "").strip() for k, v in row.items() if k is not None} for row in reader]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"{path}: cannot read the layer table ({exc})") from None
    for column in LAYER_TABLE_COLUMNS[:2]:
        if column not in header:
            raise InputError(f"{path}: column {column!r} missing (found {', '.join(header) or 'none'}; "
                             f"expected name,path[,band])")
    if not rows:
        raise InputError(f"{path}: the layer table has no rows; expected one row per climate variable")
    layers, seen = [], set()
    for line, row in enumerate(rows, start=2):
        where = f"{path}: line {line}"
        name = check_layer_name(row["name"], where)
        if name in seen:
            raise InputError(f"{where}: layer name {name!r} appears twice; expected each variable once")
        seen.add(name)
        file = Path(row["path"]).expanduser()
        file = file if file.is_absolute() else path.parent / file
        if not row["path"] or not file.is_file():
            raise InputError(f"{where}: layer {name!r}: file {file} not found")
        layers.append(ClimateLayer(name, file, _band(row.get("band", ""), f"{where}: layer {name!r}")))
    return layers
