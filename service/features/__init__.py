"""From input to the model's feature matrix: the feature builder for event tables, and raw
timelines (readings, failures, actions, attributes) to snapshots with look-back window features
and horizon labels. Training and scoring both build features here, so they cannot differ.

May import: errors, files, spec.
"""
