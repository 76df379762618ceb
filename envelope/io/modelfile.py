"""The model file (.envm): a zip with a JSON manifest and a skops-serialised estimator; opens without running code."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import zipfile
from pathlib import Path

import numpy as np

from envelope import __version__
from envelope.errors import InputError, ModelError
from envelope.io.atomic import atomic_output
from envelope.provenance import json_plain, software_versions

FORMAT_NAME = "envelope-model"
FORMAT_VERSION = 1
SUFFIX = ".envm"
MANIFEST_NAME = "manifest.json"
PAYLOAD_NAME = "estimator.skops"

# The only types a model file may hold beyond what skops trusts by default (plain
# Python, NumPy arrays and scalars, and scikit-learn estimators/trees it knows are safe).
# skops refuses anything else, so loading never imports or runs arbitrary code.
ALLOWED_TYPES = [
    "envelope.models.features.FeatureExpander",
    "envelope.models.pointprocess.PointProcessModel",
    "envelope.models.percentile.PercentileEnvelope",
    "envelope.models.trees.BoostedTrees",
    "envelope.models.trees.DownsampledForest",
    "envelope.models.ensemble.SkillWeightedEnsemble",
    "envelope.models.ensemble.default_cv_auc",
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
    "sklearn.tree._tree.Tree",
]




def _method_name(estimator) -> str:
    from envelope.models import METHODS

    for name, cls in METHODS.items():
        if type(estimator) is cls:
            return name
    raise InputError(f"estimator: got {type(estimator).__name__}; expected one of the envelope "
                     f"estimators ({', '.join(c.__name__ for c in METHODS.values())})")


def _check_metadata(estimator, metadata) -> dict:
    if not isinstance(metadata, dict):
        raise InputError(f"metadata: got {type(metadata).__name__}; expected a dict")
    variables = metadata.get("variables")
    if not isinstance(variables, list) or not all(isinstance(v, dict) and "name" in v for v in variables):
        raise InputError("metadata['variables']: expected a list of dicts with at least a 'name' "
                         "(and optionally 'units', 'min', 'max', 'percentiles')")
    names = [str(v["name"]) for v in variables]
    n_in = getattr(estimator, "n_features_in_", None)
    if n_in is None:
        raise ModelError(f"{type(estimator).__name__} is not fitted; fit it before saving")
    if n_in != len(names):
        raise InputError(f"metadata['variables']: {len(names)} variables ({', '.join(names)}) but the "
                         f"estimator was fitted on {n_in}")
    fitted_names = getattr(estimator, "feature_names_in_", None)
    if fitted_names is not None and [str(n) for n in fitted_names] != names:
        raise InputError(f"metadata['variables']: names {names} differ from the estimator's "
                         f"{[str(n) for n in fitted_names]}")
    try:
        # round trip through JSON now, so a bad value fails before anything is written
        return json.loads(json.dumps(json_plain(metadata), allow_nan=True))
    except TypeError as exc:
        raise InputError(f"metadata: {exc}; expected JSON-like values (str, numbers, lists, dicts)") from None


def save_model(path, estimator, metadata: dict, *, overwrite: bool = False) -> Path:
    """Write ``estimator`` and ``metadata`` to one model file, atomically.

    Parameters
    ----------
    path : str or PathLike
        Target file (suffix ``.envm`` suggested). Refused if it exists unless ``overwrite``.
    estimator : fitted envelope estimator (a value of ``envelope.models.METHODS``)
    metadata : dict
        JSON-like description kept in ``manifest.json``. ``variables`` (list of dicts with
        ``name`` and optionally ``units``, ``min``, ``max``, ``percentiles``) is required
        and must match the estimator's input; other keys the fit pipeline uses:
        ``mess_reference``, ``threshold`` (``{"value", "rule"}``), ``cv`` (``{"scheme",
        "n_folds", "metrics": {name: {"mean", "sd"}}}``), ``provenance`` (``{"inputs":
        {file: sha256}, "seed"}``), ``feature_classes`` (``{"chosen", "rule", "criterion",
        "scores"}``).

    Returns
    -------
    Path of the written file.

    Examples
    --------
    >>> save_model("model.envm", fitted, {"variables": [{"name": "bio1"}]})  # doctest: +SKIP
    """
    import skops.io as sio

    method = _method_name(estimator)
    meta = _check_metadata(estimator, metadata)
    payload = sio.dumps(estimator)
    # refuse now what load_model would refuse later (e.g. a user callable in an ensemble)
    foreign = sorted(set(sio.get_untrusted_types(data=payload)) - set(ALLOWED_TYPES))
    if foreign:
        raise ModelError(f"{path}: cannot store type {foreign[0]}; a model file holds only envelope "
                         "estimators, scikit-learn and NumPy types")
    manifest = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "software": software_versions(),
        "method": method,
        "estimator": f"{type(estimator).__module__}.{type(estimator).__qualname__}",
        "estimator_params": json.loads(json.dumps(
            {k: v for k, v in estimator.get_params(deep=False).items() if k != "members"},
            default=lambda o: repr(o))),
        "payload": {"name": PAYLOAD_NAME, "sha256": hashlib.sha256(payload).hexdigest(),
                    "bytes": len(payload)},
        "metadata": meta,
    }
    with atomic_output(path, overwrite=overwrite) as tmp:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            zf.writestr(MANIFEST_NAME, json.dumps(manifest, indent=2, allow_nan=True))
            zf.writestr(PAYLOAD_NAME, payload)
    return Path(path)


def _open_zip(path) -> zipfile.ZipFile:
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{path}: model file not found")
    if not zipfile.is_zipfile(p):
        raise ModelError(f"{path}: not an envelope model file (not a zip container)")
    try:
        return zipfile.ZipFile(p)
    except (zipfile.BadZipFile, OSError) as exc:
        raise ModelError(f"{path}: damaged model file ({exc})") from None


def _read_member(zf: zipfile.ZipFile, name: str, path) -> bytes:
    try:
        return zf.read(name)
    except KeyError:
        raise ModelError(f"{path}: not an envelope model file (no {name} inside)") from None
    except (zipfile.BadZipFile, OSError, EOFError, ValueError) as exc:
        raise ModelError(f"{path}: damaged model file ({name}: {exc})") from None
    except Exception as exc:  # zlib.error on a corrupted deflate stream
        raise ModelError(f"{path}: damaged model file ({name}: {exc})") from None


def _parse_manifest(raw: bytes, path) -> dict:
    try:
        manifest = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelError(f"{path}: damaged model file (manifest.json is not valid JSON: {exc})") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_NAME:
        found = manifest.get("format") if isinstance(manifest, dict) else type(manifest).__name__
        raise ModelError(f"{path}: not an envelope model file (format {found!r}; expected {FORMAT_NAME!r})")
    version = manifest.get("format_version")
    if not isinstance(version, int) or version < 1:
        raise ModelError(f"{path}: bad format_version {version!r}; expected a whole number >= 1")
    if version > FORMAT_VERSION:
        raise ModelError(f"{path}: written by a newer envelope (format_version {version}; this "
                         f"version reads up to {FORMAT_VERSION}); upgrade envelope")
    for key in ("payload", "metadata", "method"):
        if key not in manifest:
            raise ModelError(f"{path}: damaged model file (manifest.json has no {key!r})")
    return manifest


def read_manifest(path) -> dict:
    """The manifest of a model file (format, versions, method, metadata), without the estimator.

    Raises InputError if the file is missing and ModelError if it is not a model file of
    a known format version.
    """
    with _open_zip(path) as zf:
        return _parse_manifest(_read_member(zf, MANIFEST_NAME, path), path)


# Modules whose classes moved: model files written before the move name the old module in
# their skops schema. The names are rewritten (after the checksum check, before the type
# check), so such files load with the same allow-list; nothing else in the payload changes.
MOVED_MODULES = {"envelope.features": "envelope.models.features"}


def _with_moved_modules(payload: bytes) -> bytes:
    """The skops payload with :data:`MOVED_MODULES` renamed in its schema (unchanged if none occur)."""
    import io

    with zipfile.ZipFile(io.BytesIO(payload)) as src:
        schema = src.read("schema.json").decode("utf-8")
        renamed = schema
        for old, new in MOVED_MODULES.items():
            renamed = renamed.replace(f'"__module__": "{old}"', f'"__module__": "{new}"')
        if renamed == schema:
            return payload
        out = io.BytesIO()
        with zipfile.ZipFile(out, "w") as dst:
            for item in src.infolist():
                data = renamed.encode("utf-8") if item.filename == "schema.json" else src.read(item)
                dst.writestr(item, data)
    return out.getvalue()


def load_model(path):
    """Open a model file safely: returns ``(estimator, metadata)``.

    The payload's SHA-256 must match the manifest, and skops loads only
    :data:`ALLOWED_TYPES` plus its own safe defaults; anything else — a wrong checksum,
    an untrusted type, a non-zip or a foreign zip — raises ModelError naming the file.
    """
    import skops.io as sio

    with _open_zip(path) as zf:
        manifest = _parse_manifest(_read_member(zf, MANIFEST_NAME, path), path)
        info = manifest["payload"]
        name = info.get("name", PAYLOAD_NAME) if isinstance(info, dict) else PAYLOAD_NAME
        payload = _read_member(zf, name, path)
    expected = info.get("sha256") if isinstance(info, dict) else None
    if hashlib.sha256(payload).hexdigest() != expected:
        raise ModelError(f"{path}: estimator checksum does not match the manifest; the file was "
                         "altered or damaged")
    try:
        payload = _with_moved_modules(payload)
        untrusted = sio.get_untrusted_types(data=payload)
    except Exception as exc:
        raise ModelError(f"{path}: estimator payload is not a skops file ({type(exc).__name__}: {exc})") from None
    foreign = sorted(set(untrusted) - set(ALLOWED_TYPES))
    if foreign:
        raise ModelError(f"{path}: refusing to load untrusted type {foreign[0]}"
                         + (f" (and {len(foreign) - 1} more)" if len(foreign) > 1 else ""))
    try:
        estimator = sio.loads(payload, trusted=ALLOWED_TYPES)
    except Exception as exc:
        raise ModelError(f"{path}: estimator could not be loaded ({type(exc).__name__}: {exc})") from None
    from envelope.models import METHODS

    if type(estimator) not in METHODS.values():
        raise ModelError(f"{path}: holds a {type(estimator).__name__}, not an envelope estimator")
    return estimator, manifest["metadata"]


def model_summary(manifest: dict) -> dict:
    """Plain summary of a manifest for `envelope inspect` (method, variables, threshold, CV, features, provenance).

    ``feature_classes`` is the metadata's record of the point-process feature classes
    (chosen set, rule, per-set CV scores), or None in files written before it was kept.
    """
    meta = manifest.get("metadata", {})
    return {
        "file_format": f"{manifest.get('format')} v{manifest.get('format_version')}",
        "created": manifest.get("created"),
        "method": manifest.get("method"),
        "estimator": manifest.get("estimator"),
        "estimator_params": manifest.get("estimator_params", {}),
        "software": manifest.get("software", {}),
        "variables": meta.get("variables", []),
        "threshold": meta.get("threshold"),
        "cv": meta.get("cv"),
        "feature_classes": meta.get("feature_classes"),
        "provenance": meta.get("provenance"),
    }


__all__ = ["ALLOWED_TYPES", "FORMAT_NAME", "FORMAT_VERSION", "SUFFIX", "load_model", "model_summary",
           "read_manifest", "save_model"]

