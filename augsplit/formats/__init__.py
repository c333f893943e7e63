"""The users' formats in and out. `table`: CSV, TSV and Parquet tables (files or folders)."""

from .table import Table, open_table_file, read_table

__all__ = ["Table", "open_table_file", "read_table"]
