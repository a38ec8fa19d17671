"""The ``causeline`` command line: one entry point over ``training`` and ``service``."""
