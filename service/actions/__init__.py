"""What to change on one event: the cheapest allowed change of controllable features that
brings its calibrated probability below the threshold, found exactly on the model's splits.

May import: errors, spec, features, bundle, explain.
"""
