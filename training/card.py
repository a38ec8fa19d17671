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
        "technician.",
        "- Where an event touches food safety or equipment safety, follow local codes, the "
        "equipment maker's instructions and licensed practice; never delay a required "
        "action because a score is low.",
        "- Performance holds only for data like the training data; values outside the "
        "training ranges are flagged when scored.",
        "",
    ]
    return "\n".join(lines)
