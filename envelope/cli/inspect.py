"""`envelope inspect`: check a model file as loading does, and print what it holds."""

from __future__ import annotations

import json

import click

from envelope.cli.options import json_opt


@click.command()
@click.argument("model_file", type=click.Path(dir_okay=False))
@json_opt
def inspect(model_file, as_json):
    """Print what a model file holds.

    Shows the method, the variables with their units and training range, the threshold
    and its rule, the cross-validation summary, the feature classes of a point-process
    model (and how they were chosen) and the provenance (input checksums,
    seed, software versions). The file is checked exactly as `envelope project` checks
    it (one checksum over every member, no repeated or oversized member, only allow-listed
    types in the estimator), so a file that cannot be projected is refused here too, and
    inspecting a file never runs code from it.

    \b
    Examples:
      $ envelope inspect model.envm
      $ envelope inspect model.envm --json > model.json
    """
    from envelope.pipelines.info import describe_model

    summary = describe_model(model_file)
    if as_json:
        click.echo(json.dumps(summary, indent=2, default=str))
        return
    for line in _text_lines(model_file, summary):
        click.echo(line)


def _fmt(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return "-" if value is None else str(value)


def _text_lines(path, s: dict):
    yield f"Model file   {path}"
    yield f"Format       {s['file_format']}, created {_fmt(s['created'])}"
    yield f"Method       {s['method']} ({s['estimator']})"
    params = ", ".join(f"{k}={v}" for k, v in s["estimator_params"].items())
    if params:
        yield f"Parameters   {params}"
    yield "Variables"
    for v in s["variables"]:
        units = f" [{v['units']}]" if v.get("units") else ""
        rng = f"  training range {_fmt(v.get('min'))} .. {_fmt(v.get('max'))}" if "min" in v or "max" in v else ""
        yield f"  {v['name']}{units}{rng}"
    t = s["threshold"]
    if isinstance(t, dict):
        yield f"Threshold    {_fmt(t.get('value'))} (rule: {t.get('rule', '-')})"
    else:
        yield f"Threshold    {_fmt(t)}"
    cv = s["cv"]
    if isinstance(cv, dict):
        head = ", ".join(f"{k} {cv[k]}" for k in ("scheme", "n_folds") if k in cv)
        yield f"Cross-validation  {head or '-'}"
        # envelope/pipelines/fit.py writes flat keys (auc_mean, auc_sd, ...); older manifests a nested "metrics"
        for key, label in _CV_METRICS:
            if f"{key}_mean" in cv or f"{key}_sd" in cv:
                yield f"  {label:<16} {_fmt(cv.get(f'{key}_mean'))} ± {_fmt(cv.get(f'{key}_sd'))}"
        for name, m in (cv.get("metrics") or {}).items():
            if isinstance(m, dict):
                yield f"  {name:<16} {_fmt(m.get('mean'))} ± {_fmt(m.get('sd'))}"
            else:
                yield f"  {name:<16} {_fmt(m)}"
    else:
        yield "Cross-validation  -"
    yield from _feature_lines(s.get("feature_classes"), s["method"])
    prov = s["provenance"]
    software = dict(s["software"] or {})
    yield "Provenance"
    if isinstance(prov, dict):
        for name, digest in (prov.get("inputs") or {}).items():
            yield f"  {name}  sha256 {str(digest)[:16]}…"
        for k, v in prov.items():
            if k == "software" and isinstance(v, dict):
                # the fit records its versions here too; merge them into the one software line
                software = {**v, **software}
            elif k != "inputs":
                yield f"  {k}: {_fmt(v)}"
    yield "  software: " + (", ".join(f"{k} {v}" for k, v in software.items()) or "-")


def _feature_lines(fc, method):
    if not isinstance(fc, dict):
        if method in ("pointprocess", "ensemble"):
            yield "Features     not recorded (model file from an earlier version)"
        return
    chosen = ", ".join(fc.get("chosen") or []) or "-"
    member = f" (member {fc['member']})" if fc.get("member") else ""
    rule = fc.get("rule")
    how = {"one-standard-error": "chosen by cross-validation, one-standard-error rule",
           "given": "given"}.get(rule, rule or "-")
    yield f"Features     {chosen}{member} ({how})"
    scores = fc.get("scores") or []
    if scores:
        width = max(len(", ".join(r.get("classes") or [])) for r in scores)
        for r in scores:
            names = ", ".join(r.get("classes") or [])
            mark = "  <- chosen" if r.get("classes") == fc.get("chosen") else ""
            yield (f"  {names:<{width}}  AUC {_fmt(r.get('mean_auc'))} ± {_fmt(r.get('se'))}"
                   f"  C {_fmt(r.get('C'))}{mark}")


_CV_METRICS = (("auc", "AUC"), ("tss", "TSS"), ("kappa", "kappa"), ("boyce", "Boyce"),
               ("omission_p10", "omission at P10"))
