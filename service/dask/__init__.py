"""The batch jobs (explain, root cause) on a Dask cluster, partition by partition. The only
subpackage that imports ``dask`` or ``distributed``; ``rootcause`` holds the work per slice that
both engines run.

May import: errors, files, spec, features, bundle, explain, actions, rootcause.
"""
