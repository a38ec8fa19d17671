"""Did the fix work: the change in the event rate of entities after a maintenance action,
measured against comparable entities not treated in the same weeks (a stacked
difference-in-differences over entity-weeks, with a cluster bootstrap over entities), beside
the model's own estimate for the same entities, with plain warnings where no honest number
exists. CSVs, ``summary.json`` and an offline HTML page.

May import: errors, files, spec, features, bundle, explain, rootcause, report.
"""
