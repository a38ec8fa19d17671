"""What a data set means: the models of a data-set config (YAML, read by training) and of the spec
a bundle's manifest stores (JSON), the ``timeline:`` section, and the arithmetic expressions of
derived features. Pure validation: nothing here reads data.

May import: errors.
"""
