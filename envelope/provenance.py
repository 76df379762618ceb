"""Provenance: file checksums, software versions and JSON-safe values, one copy each."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import platform
from pathlib import Path

import numpy as np

from envelope import __version__

__all__ = ["file_sha256", "table_sha256", "json_plain", "json_ready", "json_text", "software_versions"]


def file_sha256(path) -> str:
    """SHA-256 of a file (or of every file of a folder, in sorted order), for provenance."""
    h = hashlib.sha256()
    p = Path(path)
    files = sorted(p.rglob("*")) if p.is_dir() else [p]
    for f in files:
        if f.is_file():
            with open(f, "rb") as fh:
                for chunk in iter(lambda: fh.read(1 << 20), b""):
                    h.update(chunk)
    return h.hexdigest()


def table_sha256(table) -> str:
    """SHA-256 of a pandas table's CSV text: the checksum of records handed over in memory."""
    return hashlib.sha256(table.to_csv(index=False).encode()).hexdigest()


def software_versions() -> dict:
    """Versions of envelope, Python and the libraries whose numbers shape a result."""
    import scipy
    import sklearn
    import xarray

    versions = {"envelope": __version__, "python": platform.python_version(), "numpy": np.__version__,
                "scipy": scipy.__version__, "scikit-learn": sklearn.__version__, "xarray": xarray.__version__}
    try:
        import skops

        versions["skops"] = skops.__version__
    except ImportError:  # pragma: no cover - skops is a core dependency
        pass
    return versions


def json_plain(obj):
    """Nested built-ins: NumPy arrays and scalars unwrapped, paths and dates as text; NaN kept."""
    if isinstance(obj, dict):
        return {str(k): json_plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return json_plain(obj.tolist())
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, (Path, _dt.datetime, _dt.date)):
        return str(obj)
    return obj


def json_ready(obj):
    """Like :func:`json_plain`, with NaN and ±inf as None (strict JSON has no NaN)."""
    obj = json_plain(obj)
    if isinstance(obj, dict):
        return {k: json_ready(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [json_ready(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def json_text(obj) -> str:
    """Strict, indented JSON text of a summary (NaN as null)."""
    return json.dumps(json_ready(obj), indent=2, allow_nan=False)
