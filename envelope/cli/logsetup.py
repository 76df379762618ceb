"""Warnings from NumPy, rasterio, dask and others routed into the tool's logging, one line each."""

from __future__ import annotations

import logging
import warnings

__all__ = ["route_warnings"]

log = logging.getLogger("envelope.warnings")


def _log_warning(message, category, filename, lineno, file=None, line=None):
    # one line in the tool's own format ("WARNING envelope.warnings: ..."), naming the
    # library that warned; the source line is shown only with -vv
    origin = filename.rsplit("site-packages/", 1)[-1]
    log.warning("%s: %s", category.__name__, " ".join(str(message).split()))
    log.debug("(%s:%d)", origin, lineno)


def route_warnings() -> None:
    """Send every ``warnings.warn`` of this process to the ``envelope.warnings`` logger.

    Without this, library warnings are printed raw to stderr between the tool's own
    lines, with file names and source lines. Each distinct warning is still shown once
    per location (Python's default filter).
    """
    warnings.showwarning = _log_warning
