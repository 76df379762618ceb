"""The model file (.envm): a zip with a JSON manifest and a skops-serialised estimator; opens without running code."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import logging
import zipfile
from pathlib import Path


from envelope.errors import InputError, ModelError
from envelope.io.atomic import atomic_output
from envelope.provenance import json_plain, software_versions

log = logging.getLogger(__name__)

FORMAT_NAME = "envelope-model"
#: 2: one SHA-256 over every member (the manifest included) in ``digest.sha256``;
#: 1: a SHA-256 of the estimator only, in the manifest (still read, with a warning).
FORMAT_VERSION = 2
SUFFIX = ".envm"
MANIFEST_NAME = "manifest.json"
PAYLOAD_NAME = "estimator.skops"
DIGEST_NAME = "digest.sha256"

#: Largest uncompressed member sizes, checked from the zip directory before anything is
#: read (a small compressed member can expand to gigabytes). The manifest holds variable
#: ranges, CV scores and the MESS reference (kilobytes); the estimator of a large tree
#: ensemble is tens of megabytes.
MAX_MEMBER_BYTES = {MANIFEST_NAME: 16 * 2**20, DIGEST_NAME: 1024}
MAX_PAYLOAD_BYTES = 1024 * 2**20

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
    members = {MANIFEST_NAME: json.dumps(manifest, indent=2, allow_nan=True).encode("utf-8"), PAYLOAD_NAME: payload}
    with atomic_output(path, overwrite=overwrite) as tmp:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for name, data in members.items():
                zf.writestr(name, data)
            zf.writestr(DIGEST_NAME, f"sha256 {members_digest(members)}\n")
    return Path(path)


def members_digest(members: dict) -> str:
    """SHA-256 (hex) over every member of a model file but the digest itself.

    Members are taken in name order, each as its UTF-8 name, a NUL byte, its length as
    8 bytes (big-endian) and its bytes, so no two different sets of members hash alike by
    moving bytes from one member to the next.
    """
    h = hashlib.sha256()
    for name in sorted(members):
        data = members[name]
        h.update(name.encode("utf-8") + b"\0" + len(data).to_bytes(8, "big"))
        h.update(data)
    return h.hexdigest()


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


def _check_directory(zf: zipfile.ZipFile, path) -> dict:
    """The zip directory as ``{name: ZipInfo}``; ModelError for repeated or oversized members.

    Sizes come from the directory, so nothing is decompressed before it is known to be
    small enough (reading itself is capped too: the directory could lie).
    """
    infos = {}
    for info in zf.infolist():
        if info.filename in infos:
            raise ModelError(f"{path}: member {info.filename!r} appears twice (expected each member once); "
                             "the file was altered")
        infos[info.filename] = info
    return infos


def _read_member(zf: zipfile.ZipFile, infos: dict, name: str, path, limit: int) -> bytes:
    info = infos.get(name)
    if info is None:
        raise ModelError(f"{path}: not an envelope model file (no {name} inside)")
    if info.file_size > limit:
        raise ModelError(f"{path}: member {name} would expand to {info.file_size:,} bytes (at most {limit:,} "
                         "expected); the file was altered or is not a model file")
    try:
        with zf.open(info) as stream:
            data = stream.read(limit + 1)
    except (zipfile.BadZipFile, OSError, EOFError, ValueError) as exc:
        raise ModelError(f"{path}: damaged model file ({name}: {exc})") from None
    except Exception as exc:  # zlib.error on a corrupted deflate stream
        raise ModelError(f"{path}: damaged model file ({name}: {exc})") from None
    if len(data) > limit:
        raise ModelError(f"{path}: member {name} expands past {limit:,} bytes; the file was altered")
    return data


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


def _verified_members(path) -> tuple[dict, bytes]:
    """``(manifest, payload bytes)`` of a model file after every container check.

    Checked in this order, before any estimator is built: a zip; each member name once;
    only the known members; sizes within :data:`MAX_MEMBER_BYTES` / :data:`MAX_PAYLOAD_BYTES`
    (from the directory); a manifest of a known format; the digest of every member
    (format 2) or the estimator's checksum (format 1, with a warning that the manifest is
    not covered).
    """
    with _open_zip(path) as zf:
        infos = _check_directory(zf, path)
        manifest_raw = _read_member(zf, infos, MANIFEST_NAME, path, MAX_MEMBER_BYTES[MANIFEST_NAME])
        manifest = _parse_manifest(manifest_raw, path)
        info = manifest["payload"]
        payload_name = info.get("name", PAYLOAD_NAME) if isinstance(info, dict) else PAYLOAD_NAME
        if payload_name != PAYLOAD_NAME:
            raise ModelError(f"{path}: manifest names the estimator {payload_name!r} (expected {PAYLOAD_NAME!r}); "
                             "the file was altered")
        version = manifest["format_version"]
        known = {MANIFEST_NAME, payload_name} | ({DIGEST_NAME} if version >= 2 else set())
        extra = sorted(set(infos) - known)
        if extra:
            raise ModelError(f"{path}: unexpected member {extra[0]!r} (a model file holds only "
                             f"{', '.join(sorted(known))}); the file was altered")
        for name in infos:
            limit = MAX_PAYLOAD_BYTES if name == PAYLOAD_NAME else MAX_MEMBER_BYTES[name]
            if infos[name].file_size > limit:
                raise ModelError(f"{path}: member {name} would expand to {infos[name].file_size:,} bytes "
                                 f"(at most {limit:,} expected); the file was altered or is not a model file")
        payload = _read_member(zf, infos, payload_name, path, MAX_PAYLOAD_BYTES)
        if version >= 2:
            raw = _read_member(zf, infos, DIGEST_NAME, path, MAX_MEMBER_BYTES[DIGEST_NAME])
            members = {MANIFEST_NAME: manifest_raw, PAYLOAD_NAME: payload}
    if version >= 2:
        stated = raw.decode("ascii", "replace").split()
        if len(stated) != 2 or stated[0] != "sha256" or stated[1] != members_digest(members):
            raise ModelError(f"{path}: checksum does not match the file's contents (manifest and estimator); "
                             "the file was altered or damaged")
    else:
        log.warning("%s: model file format 1 (an older envelope): only its estimator is covered by a checksum, "
                    "not its manifest (threshold, variables); fit it again to get a file that protects both", path)
    expected = info.get("sha256") if isinstance(info, dict) else None
    if hashlib.sha256(payload).hexdigest() != expected:
        raise ModelError(f"{path}: estimator checksum does not match the manifest; the file was "
                         "altered or damaged")
    return manifest, payload


def read_manifest(path) -> dict:
    """The manifest of a model file (format, versions, method, metadata), without the estimator.

    Runs every container check of :func:`load_model` (members, sizes, checksums) but does
    not build the estimator. Raises InputError if the file is missing and ModelError if
    it is not an intact model file of a known format version.
    """
    return _verified_members(path)[0]


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


def open_model(path):
    """Open a model file safely: returns ``(estimator, manifest)``.

    Every check of :func:`read_manifest`, then skops loads only :data:`ALLOWED_TYPES`
    plus its own safe defaults; anything else — a wrong checksum, a repeated or oversized
    member, an untrusted type, a non-zip or a foreign zip — raises ModelError naming the file.
    """
    import io

    import skops.io as sio

    manifest, payload = _verified_members(path)
    try:
        with zipfile.ZipFile(io.BytesIO(payload)) as inner:
            names = [i.filename for i in inner.infolist()]
            inner_bytes = sum(i.file_size for i in inner.infolist())
    except zipfile.BadZipFile as exc:
        raise ModelError(f"{path}: estimator payload is not a skops file (BadZipFile: {exc})") from None
    if len(set(names)) != len(names) or inner_bytes > MAX_PAYLOAD_BYTES:
        raise ModelError(f"{path}: estimator payload has repeated or oversized members; the file was altered")
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
    return estimator, manifest


def load_model(path):
    """Open a model file safely: returns ``(estimator, metadata)`` (see :func:`open_model`)."""
    estimator, manifest = open_model(path)
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


__all__ = ["ALLOWED_TYPES", "DIGEST_NAME", "FORMAT_NAME", "FORMAT_VERSION", "MAX_MEMBER_BYTES", "MAX_PAYLOAD_BYTES",
           "SUFFIX", "load_model", "members_digest", "model_summary", "open_model", "read_manifest", "save_model"]

