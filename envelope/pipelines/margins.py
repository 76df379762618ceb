"""The margins pipeline: an occurrence file of all taxa and a grid in, the observed margin-shift summary JSON out."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from envelope.errors import InputError
from envelope.io.atomic import atomic_output, check_distinct, check_writable
from envelope.provenance import file_sha256, json_text

__all__ = ["MarginOptions", "load_margin_records", "margins_files"]


@dataclass
class MarginOptions:
    """Settings of `envelope margins`; each field is named as its option (``--n-cells`` -> ``n_cells``)
    and as its study-file key (``[margins] n_cells``)."""

    periods: object = None           # "FIRST-LAST,FIRST-LAST" or two (first, last) pairs
    species: str | None = None
    n_cells: int = 10
    min_records: float = 5
    bootstrap: int = 1000
    effort_correction: bool = True
    percentile: float = 95.0
    seed: int = 0
    x_column: str | None = None
    y_column: str | None = None
    crs: str | None = None


def load_margin_records(records_path, grid, options: MarginOptions):
    """Read and clean the records of all taxa against ``grid``, keeping every record of a cell.

    Records are not reduced to one per cell: the count of records of all taxa in a cell is the
    cell's recording effort.
    """
    from envelope.io.records import read_occurrences
    from envelope.records import clean_occurrences

    table = read_occurrences(records_path, x_column=options.x_column, y_column=options.y_column, crs=options.crs)
    return clean_occurrences(table, grid, crs=options.crs, one_per_cell=False, all_taxa=True)


def margins_files(records_path, grid_paths, summary_path, *, options: MarginOptions, effort=None, elevation=None,
                  overwrite=False) -> dict:
    """Observed margin shifts of ``options.species`` between ``options.periods``; writes the summary JSON.

    Parameters
    ----------
    records_path : path
        Darwin Core occurrence table holding the focal species and the other taxa recorded.
    grid_paths : path or list of paths
        The grid whose cells are the recording units (a climate grid).
    summary_path : path
        JSON summary to write (keys in docs/margins.md).
    effort : path, optional
        Effort raster on the grid: one band for both periods, or two (first, second period).
    elevation : path, optional
        Elevation raster (m) on the grid.

    Returns
    -------
    dict, the summary written.
    """
    from envelope.grids import check_same_grid
    from envelope.io.rasters import open_climate, open_layer
    from envelope.margins import margin_shifts, parse_periods

    paths = list(grid_paths) if isinstance(grid_paths, (list, tuple)) else [grid_paths]
    check_distinct({"--summary": summary_path},
                   {"RECORDS": records_path, "--effort": effort, "--elevation": elevation,
                    **{f"--grid {i + 1}": p for i, p in enumerate(paths)}})
    check_writable(summary_path, overwrite)
    periods = parse_periods(options.periods)
    if not options.species:
        raise InputError("--species: no focal species given; expected the scientific name of the taxon to measure")
    if int(options.n_cells) < 1:
        raise InputError(f"--n-cells: found {options.n_cells}; expected a whole number >= 1")
    if int(options.bootstrap) < 0:
        raise InputError(f"--bootstrap: found {options.bootstrap}; expected 0 (no intervals) or more replicates")
    grid = open_climate(paths)
    effort_values = elevation_values = None
    if effort is not None:
        stack = open_climate([effort])
        if stack.sizes["variable"] not in (1, 2):
            raise InputError(f"--effort {effort}: holds {stack.sizes['variable']} bands; expected one (both periods) "
                             "or two (first and second period)")
        check_same_grid(grid, stack, ref_name="--grid", other_name=f"--effort {effort}")
        effort_values = np.asarray(stack.values, dtype=np.float64)
    if elevation is not None:
        layer = check_same_grid(grid, open_layer(elevation), ref_name="--grid", other_name=f"--elevation {elevation}")
        elevation_values = np.asarray(layer.values, dtype=np.float64)
    records = load_margin_records(records_path, grid, options)
    summary = margin_shifts(records, grid, species=options.species, periods=periods, n_cells=int(options.n_cells),
                            min_records=options.min_records, effort=effort_values,
                            effort_correction=options.effort_correction, bootstrap=int(options.bootstrap),
                            seed=options.seed, elevation=elevation_values, percentile=options.percentile)
    inputs = {str(records_path): file_sha256(records_path), **{str(p): file_sha256(p) for p in paths}}
    for p in (effort, elevation):
        if p is not None:
            inputs[str(p)] = file_sha256(p)
    summary["provenance"] = {"inputs": inputs, "seed": options.seed}
    with atomic_output(summary_path, overwrite) as tmp:
        tmp.write_text(json_text(summary))
    return summary
