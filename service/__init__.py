"""Everything that runs on a trained bundle: loading, explaining, serving and the batch jobs.

Subpackages, from the bottom up (each may import only those named in its own docstring's
"May import" line; ``tests/test_layout.py`` holds them to it):

- ``files``: tables by suffix, rejected rows, atomic writes, checksums, spreadsheet-safe cells,
  the prediction-log format;
- ``spec``: what a data set means (data-set config and manifest models, timelines, expressions);
- ``features``: an input table or raw timelines to the model's feature matrix;
- ``bundle``: a trained bundle's manifest, verification and loading;
- ``explain``: scores, exact SHAP contributions, reason codes, the local explain job;
- ``rootcause``: the root-cause batch job (groups, fixes, tallies, tracking, HTML report);
- ``dask``: the same batch jobs on a Dask cluster;
- ``api``: the HTTP service.

``errors`` (the exceptions a user can act on) is shared by all. This package never imports
``causeline.training``: a deployment needs only a bundle and this code.
"""
