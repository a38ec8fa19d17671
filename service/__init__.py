"""Everything that runs on a trained bundle: loading, explaining, serving and batch jobs.

This package never imports ``training``: a deployment needs only a bundle and this code.
"""

__version__ = "0.1.0"
