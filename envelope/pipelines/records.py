"""The records pipeline: an occurrence file and climate grid files in, cleaned records (and their counts) out."""

from __future__ import annotations

from envelope.io.atomic import atomic_output, check_writable
from envelope.io.rasters import open_climate
from envelope.io.records import read_occurrences
from envelope.records import clean_occurrences, select_taxon, taxon_counts

__all__ = ["clean_records_file", "records_taxa"]


def clean_records_file(records_path, climate, *, x_column=None, y_column=None, crs=None, max_uncertainty_m=None,
                       record_years=None, thin_km=None, species=None, absences=False, out=None,
                       overwrite=False) -> dict:
    """Clean the records of ``records_path`` against the grid of ``climate`` (paths or named layers).

    Writes the cleaned table to ``out`` (CSV) when given. Returns the cleaning summary
    (:meth:`envelope.records.Records.summary`) with ``source``, ``input`` (what the reader
    read: format, delimiter, encoding, or the archive's core file) and ``out``.
    """
    if out is not None:
        check_writable(out, overwrite)  # refuse before any work is done
    table = read_occurrences(records_path, x_column=x_column, y_column=y_column, crs=crs)
    grid = open_climate(climate if isinstance(climate, (list, tuple)) else [climate])
    result = clean_occurrences(table, grid, max_uncertainty_m=max_uncertainty_m, record_years=record_years,
                               thin_km=thin_km, species=species, absences=absences)
    if out is not None:
        with atomic_output(out, overwrite) as tmp:
            result.table.to_csv(tmp, index=False)
    summary = result.summary()
    summary["source"] = str(records_path)
    summary["input"] = dict(table.attrs.get("read", {}))
    if out is not None:
        summary["out"] = str(out)
    return summary


def records_taxa(records_path, *, x_column=None, y_column=None, crs=None, species=(),
                 option: str = "records.species") -> dict | None:
    """The taxa an occurrence file names, ``{name: records}`` (None when it has no taxon column).

    Each name of ``species`` is matched as the cleaning matches it
    (:func:`envelope.records.select_taxon`); InputError names the first that matches no record,
    with the nearest names.
    """
    table = read_occurrences(records_path, x_column=x_column, y_column=y_column, crs=crs)
    for name in species:
        select_taxon(table, name, source=str(records_path), option=option)
    return taxon_counts(table)
