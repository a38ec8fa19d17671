"""The root-cause batch job: events that share a mix of reason codes become root-cause groups,
each with its leading codes, drivers, suggested fix and a model estimate of the events the fix
would avoid; groups keep their ids across runs; CSVs, ``summary.json`` and an offline HTML report.
The work on slices of events is shared with the Dask engine.

May import: errors, files, spec, features, bundle, explain, actions, report.
"""
