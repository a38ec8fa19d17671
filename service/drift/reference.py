"""Building the drift reference a bundle keeps (:mod:`causeline.service.bundle.reference`).

Training calls :func:`build_reference` with the feature matrix of every row the model was built
from and the positions of the held-out rows. Features are described on all rows, as the
manifest's ranges are. Reason codes and scores are counted on two parts: ``training`` (all
rows) and ``held_out`` (rows the trees were not fitted on, the card's test part); each on at
most ``MAX_ROWS`` rows drawn at random, since explaining costs time per row.
"""

from __future__ import annotations

import numpy as np

from causeline.service.bundle.reference import REFERENCE_FORMAT, Reference
from causeline.service.drift.stats import decile_cuts
from causeline.service.drift.tally import (
    CodeTally,
    Scorer,
    ScoreTally,
    feature_reference,
    reference_part,
)
from causeline.service.spec.dataset import DatasetSpec

MAX_ROWS = 100_000
CHUNK = 50_000


def build_reference(
    scorer: Scorer, spec: DatasetSpec, categories: dict[str, list[str]], values: np.ndarray,
    held_out: np.ndarray, threshold: float, seed: int = 0, entities: int | None = None,
) -> Reference:
    """The reference of a model built from ``values`` (rows x features, the builder's matrix)."""
    rng = np.random.default_rng(seed)
    features = {
        feature.name: feature_reference(values[:, position], feature.kind,
                                        len(categories.get(feature.name, ())))
        for position, feature in enumerate(spec.features)
    }
    everything = np.arange(values.shape[0])
    sampled = False
    parts = {}
    for name, rows in (("training", everything), ("held_out", np.asarray(held_out))):
        if rows.size > MAX_ROWS:
            rows, sampled = np.sort(rng.choice(rows, MAX_ROWS, replace=False)), True
        if rows.size == 0:
            continue
        scores = [scorer.score(values[chunk]) for chunk in np.array_split(
            rows, max(1, -(-rows.size // CHUNK)))]
        probability = np.concatenate([s.probability for s in scores])
        codes = CodeTally(len(scorer.code_ids), threshold)
        tally = ScoreTally(decile_cuts(probability), threshold)
        for scored in scores:
            codes.add(scored)
            tally.add(scored.probability)
        parts[name] = reference_part(codes, tally, scorer.code_ids)
    return Reference(format=REFERENCE_FORMAT, rows=int(values.shape[0]), entities=entities,
                     sampled=sampled,
                     features=features, parts=parts)
