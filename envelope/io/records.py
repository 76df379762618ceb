"""Reading occurrence tables (CSV/TSV or Darwin Core Archive zip; Darwin Core or user-named coordinate columns)."""

from __future__ import annotations

import codecs
import csv
import logging
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd

from envelope.errors import InputError
from envelope.grids import crs_label, parse_crs
from envelope.io.dwca import is_zip, read_core
from envelope.terms import DWC_LATITUDE, DWC_LONGITUDE, DWC_TERMS, MALFORMED_FLAG, to_float

_CANDIDATE_DELIMITERS = (",", "\t", ";", "|")
_SNIFF_BYTES = 1 << 16
#: A table with more broken rows (wrong field count, broken quotes) than this share -- and more
#: than MAX_BROKEN_ROWS of them -- is refused rather than cleaned: the delimiter or quoting is
#: likely wrong, and dropping the rows would hide it. Common practice, no source.
MAX_BROKEN_SHARE = 0.05
MAX_BROKEN_ROWS = 2
_SUFFIX_DELIMITERS = {".csv": ",", ".tsv": "\t", ".tab": "\t", ".txt": "\t"}
#: A degree value written with a decimal comma (European spreadsheet exports): ``-144,17368``.
_DECIMAL_COMMA = re.compile(r"[+-]?\d+,\d+")

log = logging.getLogger(__name__)


def read_occurrences(
    path: str | os.PathLike,
    *,
    x_column: str | None = None,
    y_column: str | None = None,
    crs=None,
    delimiter: str | None = None,
) -> pd.DataFrame:
    """Read an occurrence table from a delimited text file.

    Coordinates come from the Darwin Core columns ``decimalLongitude``/``decimalLatitude``
    (EPSG:4326 implied; names matched regardless of case), or from ``x_column``/``y_column``
    with a stated ``crs``. A table without the Darwin Core columns whose coordinates sit under
    a plain name (``longitude``/``latitude``, ``lon``/``lat``, ``long``/``lat``, ``lng``/``lat``,
    any case) is read from those, in degrees of ``crs`` (EPSG:4326 by default), and says so
    in the log and in ``attrs["read"]["degree_columns"]``. Other Darwin Core terms are kept and read by the cleaning
    (``coordinateUncertaintyInMeters``, ``eventDate``, ``year``, ``occurrenceStatus``,
    ``basisOfRecord``, ``occurrenceID``); every other column is kept as text.

    Broken rows (wrong number of fields, coordinates missing or not numbers) are kept and
    flagged in the boolean column ``malformed`` so that
    :func:`envelope.records.clean_occurrences` counts them; only a file without a single
    usable row is an error.

    Parameters
    ----------
    path : path-like
        CSV, TSV or other delimited text, UTF-8 (a byte-order mark is allowed), or a Darwin
        Core Archive: a zip whose ``meta.xml`` describes the core file
        (:func:`envelope.io.dwca.read_core`; recognised by content, whatever the suffix).
    x_column, y_column : str, optional
        Coordinate columns when they are not Darwin Core; then ``crs`` is required.
    crs : str, optional
        CRS of the coordinates, anything pyproj understands ("EPSG:3035"); default EPSG:4326
        for Darwin Core columns.
    delimiter : str, optional
        Field separator; by default the one of ``, TAB ; |`` found most often in the header
        line (ties broken by the file suffix: .csv comma, .tsv/.tab/.txt tab).

    Returns
    -------
    pandas.DataFrame
        Source columns (text, NaN where empty), then ``x_record``, ``y_record`` (float64),
        ``line`` (line number in the file) and ``malformed`` (bool). ``attrs`` holds
        ``source`` (the path), ``crs``, ``x_column``, ``y_column`` and ``read`` (what was
        read: format, delimiter, encoding, byte-order mark or the archive's core file, row
        type and ignored extensions, and the number of rows).

    Raises
    ------
    InputError
        Missing or empty file, no header, coordinate columns missing (the columns found are
        listed), CRS not understood, or no usable row.

    References
    ----------
    Wieczorek, J. et al. (2012) Darwin Core: an evolving community-developed biodiversity
    data standard. PLoS ONE 7(1): e29715.

    Examples
    --------
    >>> table = read_occurrences("records.csv")                              # doctest: +SKIP
    >>> table = read_occurrences("plots.tsv", x_column="easting", y_column="northing",
    ...                          crs="EPSG:3035")                             # doctest: +SKIP
    """
    path = Path(path)
    if (x_column is None) != (y_column is None):
        raise InputError(f"{path}: give both x_column and y_column, or neither (for {DWC_LONGITUDE}/{DWC_LATITUDE})")
    if delimiter is not None and len(delimiter) != 1:
        raise InputError(f"{path}: delimiter {delimiter!r}; expected a single character")
    user_columns = x_column is not None and (x_column, y_column) != (DWC_LONGITUDE, DWC_LATITUDE)
    if user_columns and crs is None:
        raise InputError(f"{path}: columns {x_column!r}/{y_column!r} are not Darwin Core; state their CRS "
                         "(e.g. crs='EPSG:3035' or --crs EPSG:3035)")
    record_crs = parse_crs(crs if crs is not None else "EPSG:4326", str(path))

    if is_zip(path):
        core = read_core(path)
        header, rows, lines, wrong_length, read_info = core.columns, core.rows, core.lines, core.wrong_length, core.info
        if not rows:
            raise InputError(f"{path}: the archive's core file {core.info['core']} holds no records")
    elif path.suffix.lower() == ".zip" and path.is_file():
        raise InputError(f"{path}: not a zip archive (damaged or not a download); expected a Darwin Core "
                         "Archive zip with a meta.xml, or a CSV/TSV file")
    else:
        header, rows, lines, wrong_length, read_info = _read_delimited(path, delimiter)
    table = pd.DataFrame(rows, columns=header, dtype=object)
    table = table.apply(lambda s: s.str.strip()).replace("", np.nan)
    table = _canonical_terms(table)

    if x_column is None:
        x_column, y_column = DWC_LONGITUDE, DWC_LATITUDE
        plain = _plain_degree_columns(table) if record_crs.is_geographic else None
        if plain is not None and not {DWC_LONGITUDE, DWC_LATITUDE} & set(table.columns):
            x_column, y_column = plain
            log.info("%s: no %s/%s columns; reading %r/%r as longitude/latitude in %s", path, DWC_LONGITUDE,
                     DWC_LATITUDE, x_column, y_column, crs_label(record_crs))
            read_info = {**read_info, "degree_columns": [x_column, y_column]}
    for name in (x_column, y_column):
        if name not in table.columns:
            found = ", ".join(map(str, header))
            hint = "" if user_columns else " (or name them with x_column/y_column and crs)"
            raise InputError(f"{path}: no column {name!r}; columns found: {found}{hint}")

    comma = record_crs.is_geographic and any(_has_decimal_commas(table[c]) for c in (x_column, y_column))
    if comma:
        log.warning("%s: coordinates written with a decimal comma (-144,17) are read as decimal degrees", path)
        for name in (x_column, y_column):
            table[name] = _comma_to_point(table[name])
        read_info = {**read_info, "decimal_comma": True}
    x = to_float(table[x_column])
    y = to_float(table[y_column])
    usable_xy = np.isfinite(x) & np.isfinite(y)
    malformed = np.asarray(wrong_length, dtype=bool) | ~usable_xy
    if malformed.all():
        first = int(np.flatnonzero(malformed)[0])
        raise InputError(
            f"{path}: none of the {len(table)} records has usable coordinates in columns {x_column!r}/{y_column!r} "
            f"(line {lines[first]}: {table[x_column].iloc[first]!r}, {table[y_column].iloc[first]!r}); "
            "expected numbers"
        )
    table["x_record"] = x
    table["y_record"] = y
    table["line"] = np.asarray(lines, dtype=np.int64)
    table[MALFORMED_FLAG] = malformed
    table.attrs = {"source": str(path), "crs": crs_label(record_crs), "x_column": x_column, "y_column": y_column,
                   "read": {**read_info, "rows": len(table)}}
    return table


# Column pairs that hold degrees under a plain name (matched regardless of case), most explicit first.
_PLAIN_DEGREE_COLUMNS = (("longitude", "latitude"), ("lon", "lat"), ("long", "lat"), ("lng", "lat"))


def _plain_degree_columns(table: pd.DataFrame) -> tuple[str, str] | None:
    """The first pair of :data:`_PLAIN_DEGREE_COLUMNS` in ``table``, as the table spells it; None if none
    (or if a name is ambiguous, two columns differing only in case)."""
    by_lower = {}
    for column in table.columns:
        by_lower.setdefault(str(column).lower(), []).append(str(column))
    for lon, lat in _PLAIN_DEGREE_COLUMNS:
        if len(by_lower.get(lon, ())) == 1 and len(by_lower.get(lat, ())) == 1:
            return by_lower[lon][0], by_lower[lat][0]
    return None


def _has_decimal_commas(column: pd.Series) -> bool:
    """Whether a coordinate column is written with decimal commas: no value holds a point and
    most non-empty values are ``digits,digits``. Only for degrees, which cannot carry thousands
    separators (|value| <= 180), so the comma there is never a grouping mark."""
    text = column.dropna().astype(str)
    if text.empty or text.str.contains(".", regex=False).any():
        return False
    return int(text.str.fullmatch(_DECIMAL_COMMA).sum()) * 2 >= len(text)


def _comma_to_point(column: pd.Series) -> pd.Series:
    return column.map(lambda v: v.replace(",", ".") if isinstance(v, str) and _DECIMAL_COMMA.fullmatch(v) else v)


def _read_delimited(path: Path, delimiter):
    """Header, rows, line numbers, wrong-length flags and a description of a delimited text file."""
    text, encoding, bom = _read_text(path)
    if not text.strip():
        raise InputError(f"{path}: file is empty; expected a header line naming the columns "
                         f"(e.g. {DWC_LONGITUDE},{DWC_LATITUDE})")
    if delimiter is None:
        delimiter = _sniff_delimiter(text, path)

    header = None
    rows, lines, wrong_length = [], [], []
    for line, fields, broken in _rows(text, delimiter):
        if not fields or all(not f.strip() for f in fields):
            continue  # blank line
        if header is None:
            if broken:
                raise InputError(f"{path}, line {line}: the header line cannot be read as {_delimiter_name(delimiter)}"
                                 "-separated fields (a stray quote?); expected column names")
            header = _header(fields, path)
            continue
        wrong_length.append(broken or len(fields) != len(header))
        # keep short rows padded and long rows cut, so other fields stay in their columns
        fields = (fields + [""] * len(header))[: len(header)]
        rows.append(fields)
        lines.append(line)
    if not rows:
        raise InputError(f"{path}: holds a header but no records; expected one record per line after the header")
    n_broken = int(np.sum(wrong_length))
    if n_broken > MAX_BROKEN_ROWS and n_broken > MAX_BROKEN_SHARE * len(rows):
        first = lines[int(np.flatnonzero(wrong_length)[0])]
        raise InputError(f"{path}: {n_broken} of {len(rows)} records have a wrong number of fields or broken quotes "
                         f"(first at line {first}); expected {len(header)} {_delimiter_name(delimiter)}-separated "
                         "fields per line. Is the delimiter or the quoting wrong?")
    info = {"format": "delimited text", "delimiter": delimiter, "encoding": encoding, "byte_order_mark": bom}
    return header, rows, lines, wrong_length, info


def _read_text(path: Path) -> tuple[str, str, bool]:
    """The text of a delimited file, its encoding's name and whether it starts with a byte-order mark.

    UTF-8 (with or without a byte-order mark) and UTF-16 with a byte-order mark (a spreadsheet's
    "Unicode text" export) are read as such. Other text that is not UTF-8 is read as
    Windows-1252, the default of spreadsheet CSV exports on Western European systems, with a
    warning: its digits and Latin letters are the same in every such code page, but accented
    letters in names may not be. A file with other NUL bytes is binary and refused.
    """
    if not path.exists():
        raise InputError(f"{path}: file not found; expected an occurrence table (CSV, TSV or Darwin Core Archive)")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; expected an occurrence table (CSV, TSV or Darwin Core Archive)")
    if not path.is_file():  # a device (/dev/zero), a pipe or a socket: never read whole
        raise InputError(f"{path}: not a regular file; expected an occurrence table (CSV, TSV or Darwin Core Archive)")
    expected = "expected a UTF-8 CSV or TSV file, or a Darwin Core Archive (zip with meta.xml)"
    with open(path, "rb") as fh:
        head = fh.read(_SNIFF_BYTES)
        if head.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
            data = head + fh.read()
            try:
                return data.decode("utf-16"), "UTF-16", True
            except UnicodeDecodeError as exc:
                raise InputError(f"{path}: starts with a UTF-16 byte-order mark but is not UTF-16 text "
                                 f"(byte {exc.start}); {expected}") from None
        nul = head.find(b"\0")
        if nul >= 0:
            raise InputError(f"{path}: binary data (a NUL byte at byte {nul}), not text; {expected}")
        data = head + fh.read()
    try:
        return data.decode("utf-8-sig"), "UTF-8", data.startswith(codecs.BOM_UTF8)
    except UnicodeDecodeError as exc:
        first = exc.start
    try:
        text = data.decode("cp1252")
    except UnicodeDecodeError:
        raise InputError(f"{path}: not UTF-8 text (byte {first}), nor Windows-1252; {expected}") from None
    log.warning("%s: not UTF-8 (byte %d); read as Windows-1252 -- check accented letters in names, or save "
                "the file as UTF-8", path, first)
    return text, "Windows-1252", False


def _rows(text: str, delimiter: str):
    """``(line, fields, broken)`` for every record of ``text``, re-synchronised after a broken one.

    A quoted field may hold line breaks, but a record that spans several lines and does not
    have as many fields as the header (a stray quote that swallowed the lines after it), or
    that the csv module refuses (a quote not closing its field, a field over the size limit), is broken: its first line
    is reported as one broken row and reading resumes on the next line.
    """
    lines = text.splitlines(keepends=True)
    source = _LineFeed(lines)
    # strict: a closing quote must end its field, so a stray quote cannot pair up with another
    # one lines later and pass for a record with line breaks in a field
    reader = csv.reader(source, delimiter=delimiter, strict=True)
    width = None
    while source.pos < len(lines):
        start = source.pos
        try:
            fields = next(reader)
        except StopIteration:
            return
        except csv.Error:
            fields = None
        span = source.pos - start
        if fields is not None and (span == 1 or width is None or len(fields) == width):
            if width is None and fields and any(f.strip() for f in fields):
                width = len(fields)
            yield start + 1, fields, False
            continue
        # broken: report the first line alone and read on from the line after it
        source.pos = start + 1
        reader = csv.reader(source, delimiter=delimiter, strict=True)
        yield start + 1, _split_plain(lines[start], delimiter), True


class _LineFeed:
    """The lines of a text, fed one by one to ``csv.reader``; ``pos`` is the next line to feed."""

    def __init__(self, lines):
        self.lines, self.pos = lines, 0

    def __iter__(self):
        return self

    def __next__(self):
        if self.pos >= len(self.lines):
            raise StopIteration
        self.pos += 1
        return self.lines[self.pos - 1]


def _split_plain(line: str, delimiter: str) -> list[str]:
    """The fields of one broken line, split at the delimiter without quoting rules."""
    return [f.strip().strip('"') for f in line.rstrip("\r\n").split(delimiter)]


def _delimiter_name(delimiter: str) -> str:
    return {",": "comma", "\t": "tab", ";": "semicolon", "|": "bar"}.get(delimiter, repr(delimiter))


def _sniff_delimiter(text: str, path: Path) -> str:
    first = next(line for line in text.splitlines() if line.strip())
    counts = {d: first.count(d) for d in _CANDIDATE_DELIMITERS}
    best = max(counts.values())
    preferred = _SUFFIX_DELIMITERS.get(path.suffix.lower(), ",")
    if best == 0 or counts[preferred] == best:
        return preferred
    return next(d for d in _CANDIDATE_DELIMITERS if counts[d] == best)


def _header(fields, path: Path) -> list[str]:
    names = [f.strip() for f in fields]
    if all(_is_number(n) for n in names if n):
        raise InputError(f"{path}: first line {','.join(names)!r} holds numbers, not column names; "
                         f"expected a header line (e.g. {DWC_LONGITUDE},{DWC_LATITUDE})")
    names = [n or f"unnamed_{i + 1}" for i, n in enumerate(names)]
    seen = set()
    for name in names:
        if name in seen:
            raise InputError(f"{path}: column {name!r} appears twice in the header; expected unique names")
        seen.add(name)
    return names


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _canonical_terms(table: pd.DataFrame) -> pd.DataFrame:
    """Spell Darwin Core terms the standard way ("decimallatitude" -> "decimalLatitude")."""
    present = set(table.columns)
    rename = {}
    for term in DWC_TERMS:
        if term in present:
            continue
        for column in table.columns:
            if str(column).lower() == term.lower() and column not in rename:
                rename[column] = term
                break
    return table.rename(columns=rename)
