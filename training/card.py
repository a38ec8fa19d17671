"""The model card: what the bundle is for, how well it did, and its limits, for people."""

from __future__ import annotations

from causeline.service.bundle.manifest import Manifest


def _number(value: object, digits: int = 3) -> str:
    return "n/a" if value is None else f"{float(value):.{digits}f}"  # type: ignore[arg-type]


def model_card(manifest: Manifest) -> str:
    spec = manifest.dataset
    metrics = manifest.metrics
    training = manifest.training
    lines = [
        f"# Model card: {manifest.name} {manifest.version}",
        "",
        f"Predicts `{spec.target}` for each row of the `{spec.name}` data set, with ranked "
        "reason codes for every score.",
        "",
        "## Data",
        f"- Rows: {training['rows']:,}; events: {training['events']:,}.",
        f"- Split: {training['split']['method']}; fit {training['split']['fit_rows']:,} rows, "
        f"validation {training['split']['valid_rows']:,}, held out "
        f"{training['split']['test_rows']:,}.",
        *_data_lines(manifest),
        f"- Data fingerprint (sha256 of the input file): `{manifest.data_fingerprint}`.",
        "",
        "## Held-out performance",
        f"- ROC AUC {_number(metrics.get('roc_auc'))}, PR AUC {_number(metrics.get('pr_auc'))}, "
        f"Brier score {_number(metrics.get('brier'), 4)}.",
        f"- Decision threshold {manifest.decision.threshold:.4f} ({manifest.decision.rule}): "
        f"precision {_number(metrics.get('precision_at_threshold'))}, recall "
        f"{_number(metrics.get('recall_at_threshold'))}.",
        "",
        "| predicted (bin mean) | observed rate | rows |",
        "|---:|---:|---:|",
    ]
    for row in metrics.get("calibration", []):
        lines.append(f"| {row['predicted']:.4f} | {row['observed']:.4f} | {row['rows']:,} |")
    lines += [
        "",
        "## Explanations",
        f"- Engine: {manifest.explainer.method}, exact TreeSHAP in {manifest.explainer.output}; "
        f"base value {manifest.explainer.base_value:.4f}.",
        f"- Up to {manifest.explain.top_k} reason codes per event, each raising the log-odds by "
        f"more than {manifest.explain.min_contribution:g}.",
        "",
        "| code | features | fix |",
        "|---|---|---|",
    ]
    for code in spec.reason_codes:
        fix = f"{code.fix.kind}: {code.fix.action}" if code.fix else "none given"
        lines.append(f"| {code.code} | {', '.join(code.features)} | {fix} |")
    lines += [
        "",
        "## Limits and cautions",
        "- Scores and reason codes describe associations the model learned from past data. "
        "They are not proof of cause, and they do not replace inspection by a qualified "
        "person.",
        "- Where a decision touches safety, follow local codes, the equipment maker's "
        "instructions and licensed practice; never delay a required action because a score "
        "is low.",
        "- Performance holds only for data like the training data; values outside the "
        "training ranges are flagged when scored.",
    ]
    if spec.caution:
        lines.append(f"- {spec.caution}")
    lines.append("")
    return "\n".join(lines)


def _data_lines(manifest: Manifest) -> list[str]:
    """What the card says of the training data beyond its size and split."""
    training = manifest.training
    spec = manifest.dataset
    lines = []
    held = training.get("held_out_times")
    if held:
        lines.append(f"- Held out: the rows from {held['first']} to {held['last']} "
                     f"({spec.time}).")
    if spec.timeline is not None:
        lines.append(f"- Built from raw timelines: snapshots {_cadence(spec.timeline)}, "
                     f"label: an event within the next {spec.timeline.horizon}.")
    labels = training.get("labels")
    if labels:
        down = [f"{k.removeprefix('down: ')} {v:,}" for k, v in labels.items()
                if k.startswith("down: ") and v]
        lines.append(
            f"- Snapshots built: {labels.get('positive', 0):,} positive, "
            f"{labels.get('negative', 0):,} negative, {labels.get('censored', 0):,} censored "
            f"(horizon past the end of observation), {labels.get('down', 0):,} down"
            + (f" ({'; '.join(down)})" if down else "") + ". Censored and down snapshots are "
            "not trained on."
        )
    outside = training.get("held_out_outside_training") or {}
    if outside:
        shown = ", ".join(f"`{name}` {100 * share:.0f} %" for name, share in outside.items())
        lines.append(
            f"- Held-out values the fit part never saw (share of held-out rows outside the fit "
            f"part's range or categories): {shown}. The held-out metrics rest on extrapolation "
            "for these features; with a time split, calendar features are the usual case."
        )
    return lines


def _cadence(timeline: object) -> str:
    snapshots = getattr(timeline, "snapshots", None)
    every = getattr(snapshots, "every", "reading")
    at = getattr(snapshots, "at", None)
    if every == "reading":
        return "at every reading"
    return f"every {every}" + (f" at {at}" if at else "")
