"""The drift check: is the model still right? A window of recent events (a table or the
service's prediction log) against the training reference a bundle keeps: input drift per
feature, reason-code drift, score drift and, where outcomes are known, calibration; a verdict
(``ok``, ``watch``, ``retrain``) with the checks that decided it; CSVs, ``summary.json`` and an
offline HTML page.

May import: errors, progress, files, spec, features, bundle, explain, report.
"""
