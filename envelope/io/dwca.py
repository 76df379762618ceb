"""Darwin Core Archives: the core table of a zip described by its ``meta.xml`` (TDWG Darwin Core text guide)."""

from __future__ import annotations

import codecs
import csv
import io
import zipfile
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from envelope.errors import InputError

__all__ = ["ARCHIVE_ROW_TYPES", "CoreTable", "is_zip", "read_core"]

#: Core row types whose rows are occurrence records. The text guide lists the Darwin Core class
#: URIs (section 2.2); its schema's default row type is the Simple Darwin Record.
ARCHIVE_ROW_TYPES = (
    "http://rs.tdwg.org/dwc/terms/Occurrence",
    "http://rs.tdwg.org/dwc/xsd/simpledarwincore/SimpleDarwinRecord",
)
META = "meta.xml"
# Defaults of the metafile attributes (Darwin Core text guide section 2.2; tdwg_dwc_text.xsd).
_DEFAULTS = {"fieldsTerminatedBy": ",", "linesTerminatedBy": "\\n", "fieldsEnclosedBy": '"',
             "ignoreHeaderLines": "0", "encoding": "UTF-8", "rowType": ARCHIVE_ROW_TYPES[1]}
_ESCAPES = {"\\t": "\t", "\\n": "\n", "\\r": "\r", "\\r\\n": "\r\n", "\\\\": "\\"}


@dataclass
class CoreTable:
    """The core file of an archive: column names (terms), rows of text fields and their line numbers."""

    columns: list
    rows: list
    lines: list
    wrong_length: list
    info: dict = field(default_factory=dict)


def is_zip(path) -> bool:
    """True when the file starts with a zip signature (whatever its suffix)."""
    try:
        with open(path, "rb") as fh:
            return fh.read(4) in (b"PK\x03\x04", b"PK\x05\x06")
    except OSError:
        return False


def _unescape(value: str) -> str:
    if value in _ESCAPES:
        return _ESCAPES[value]
    return value.replace("\\t", "\t").replace("\\n", "\n").replace("\\r", "\r")


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def term_name(uri: str) -> str:
    """The column name of a term URI: its last path or fragment part (``.../terms/scientificName`` -> ``scientificName``)."""
    return uri.rstrip("/").replace("#", "/").rsplit("/", 1)[-1]


def _child(element, name):
    for child in element:
        if _local(child.tag) == name:
            return child
    return None


def read_core(path) -> CoreTable:
    """Read the core table of a Darwin Core Archive (a zip holding ``meta.xml``).

    ``meta.xml`` says where the core file is (``<files><location>``), which column holds
    which term (``<field index term default>``; a field without an index is a constant
    column of its default, and a default also fills empty cells), and how the file is
    written: ``fieldsTerminatedBy``, ``fieldsEnclosedBy`` (empty: no quoting),
    ``linesTerminatedBy``, ``encoding`` and ``ignoreHeaderLines``, each with the text
    guide's default when absent. Columns are named by their terms' local names
    (``decimalLatitude``); the ``<id>`` column is ``id`` unless a term maps it too.
    Extensions are not read (their row types are reported in ``info``).

    Raises
    ------
    InputError
        Not a zip, no ``meta.xml``, a metafile that is not XML or has no ``<core>``, a core
        row type that does not hold occurrences, a core file that is missing or not in the
        declared encoding.

    References
    ----------
    TDWG (2009, revised 2023) Darwin Core text guide, https://dwc.tdwg.org/text/ (sections 2.1-2.4).
    """
    path = Path(path)
    try:
        archive = zipfile.ZipFile(path)
    except zipfile.BadZipFile:
        raise InputError(f"{path}: not a readable zip archive; expected a Darwin Core Archive") from None
    with archive:
        names = archive.namelist()
        meta_name = next((n for n in names if PurePosixPath(n).name == META and n.count("/") <= 1), None)
        if meta_name is None:
            shown = ", ".join(names[:5]) + (" ..." if len(names) > 5 else "")
            raise InputError(f"{path}: zip without {META} (holds {shown or 'nothing'}); expected a Darwin Core "
                             f"Archive with a {META} metafile naming its core file")
        try:
            root = ET.fromstring(archive.read(meta_name))
        except ET.ParseError as exc:
            raise InputError(f"{path}: {meta_name} is not valid XML ({exc})") from None
        core = _child(root, "core")
        if core is None:
            raise InputError(f"{path}: {meta_name} has no <core> element; expected exactly one")
        attrs = {k: core.get(k, v) for k, v in _DEFAULTS.items()}
        row_type = attrs["rowType"].strip()
        if row_type not in ARCHIVE_ROW_TYPES:
            raise InputError(f"{path}: {meta_name}: core rowType {row_type!r} is not occurrence records; "
                             f"expected {ARCHIVE_ROW_TYPES[0]}")
        files = _child(core, "files")
        locations = [] if files is None else [(loc.text or "").strip() for loc in files
                                              if _local(loc.tag) == "location"]
        if not locations or not locations[0]:
            raise InputError(f"{path}: {meta_name}: <core> has no <files><location>; expected the core file's name")
        base = PurePosixPath(meta_name).parent
        fields_by_index, constants = {}, {}
        for f in core:
            if _local(f.tag) != "field":
                continue
            term = f.get("term")
            if not term:
                raise InputError(f"{path}: {meta_name}: a <field> of <core> has no term; expected term=URI")
            name = term_name(term)
            index = f.get("index")
            if index is None:
                constants[name] = f.get("default", "")
            else:
                try:
                    fields_by_index[int(index)] = (name, f.get("default"))
                except ValueError:
                    raise InputError(f"{path}: {meta_name}: field {name} index {index!r}; expected an integer") \
                        from None
        id_element = _child(core, "id")
        if id_element is not None and id_element.get("index") is not None:
            fields_by_index.setdefault(int(id_element.get("index")), ("id", None))
        if not fields_by_index:
            raise InputError(f"{path}: {meta_name}: <core> maps no column (no <field index=...>)")
        rows, lines, wrong = [], [], []
        width = max(fields_by_index) + 1
        encoding = attrs["encoding"].strip() or "UTF-8"
        try:
            codecs.lookup(encoding)
        except LookupError:
            raise InputError(f"{path}: {meta_name}: core encoding {encoding!r} is not known; expected e.g. UTF-8")
        delimiter = _unescape(attrs["fieldsTerminatedBy"])
        quote = _unescape(attrs["fieldsEnclosedBy"])
        terminator = _unescape(attrs["linesTerminatedBy"])
        skip = int(attrs["ignoreHeaderLines"] or 0)
        if len(delimiter) != 1 or len(quote) > 1:
            raise InputError(f"{path}: {meta_name}: fieldsTerminatedBy {attrs['fieldsTerminatedBy']!r} / "
                             f"fieldsEnclosedBy {attrs['fieldsEnclosedBy']!r}; expected single characters")
        for location in locations:
            member = str(base / location) if str(base) != "." else location
            if member not in names:
                raise InputError(f"{path}: {meta_name} names core file {location!r}, which the zip does not hold")
            try:
                text = archive.read(member).decode(encoding)
            except UnicodeDecodeError as exc:
                raise InputError(f"{path}: core file {location} is not {encoding} text (byte {exc.start}), "
                                 f"as {meta_name} declares") from None
            text = text.removeprefix("\ufeff")
            if terminator not in ("\n", "\r\n", "\r"):
                text = text.replace(terminator, "\n")
            reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter,
                                quotechar=quote or None, quoting=csv.QUOTE_MINIMAL if quote else csv.QUOTE_NONE)
            for k, fields in enumerate(reader):
                if k < skip or not fields or all(not v.strip() for v in fields):
                    continue
                wrong.append(len(fields) < width)
                fields = fields + [""] * (width - len(fields))
                rows.append(fields)
                lines.append(reader.line_num)
        order = sorted(fields_by_index)
        columns = [fields_by_index[i][0] for i in order] + list(constants)
        if len(set(columns)) != len(columns):
            dup = sorted({c for c in columns if columns.count(c) > 1})
            raise InputError(f"{path}: {meta_name}: term {dup[0]!r} is mapped twice; expected each term once")
        table = []
        for fields in rows:
            row = []
            for i in order:
                value, default = fields[i], fields_by_index[i][1]
                row.append(default if (default is not None and not value.strip()) else value)
            table.append(row + list(constants.values()))
        extensions = [e.get("rowType", "") for e in root if _local(e.tag) == "extension"]
        info = {"format": "Darwin Core Archive", "core": locations[0] if len(locations) == 1 else locations,
                "row_type": row_type, "fields": len(columns), "delimiter": delimiter, "quote": quote,
                "encoding": encoding, "header_lines": skip, "extensions_ignored": extensions}
        return CoreTable(columns=columns, rows=table, lines=lines, wrong_length=wrong, info=info)
