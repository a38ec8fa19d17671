"""Scores and their reasons: the calibrated probability, exact TreeSHAP contributions (LightGBM's
own as the reference, and a numba Fast TreeSHAP for speed), reason codes from the catalogue,
explanation records and tables, and the local ``causeline explain`` job.

May import: errors, files, spec, features, bundle.
"""
