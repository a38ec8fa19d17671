"""A trained bundle: a folder of data (JSON manifest, LightGBM's text model, model card,
checksums) that describes itself. Loading verifies every checksum and parses data only; nothing
in a bundle can run code.

May import: errors, files, spec, features.
"""
