"""Leakage audit of a dataset or parameter log: one check per module, each returning a
CheckResult; `run_audit` runs them all on pairs of splits; `report` renders the result."""

from .inputs import apply_column_map, open_table
from .report import summary_table, to_json, write_html, write_json, write_reports
from .result import FAIL, PASS, WARN, AuditResult, CheckResult, Skipped
from .run import Thresholds, run_audit

__all__ = ["run_audit", "Thresholds", "AuditResult", "CheckResult", "Skipped", "PASS", "WARN", "FAIL",
           "apply_column_map", "open_table", "summary_table", "to_json", "write_json", "write_html",
           "write_reports"]
