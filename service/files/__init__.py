"""Files in and out: tables read and written by suffix (CSV, JSON lines, Parquet), rows set aside
as rejects with a reason, atomic writes, sha256 checksums, spreadsheet-safe text cells, and the
prediction log's format.

May import: errors.
"""
