"""The `augsplit` command: parse arguments, call one library function, map errors to exit codes.

Exit codes: 0 success; 1 an audit or verification found a failure; 2 bad input.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from . import __version__
from .errors import AugsplitError


def _cmd_plan(a) -> int:
    from .build import open_spec
    from .plan.describe import plan_data, plan_text

    plan = open_spec(a.spec).plan
    print(json.dumps(plan_data(plan), indent=2) if a.json else plan_text(plan))
    return 0


def _cmd_assign(a) -> int:
    from .assign import assign, read_table, write_table
    from .build import open_spec

    plan = open_spec(a.spec).plan
    res = assign(plan, read_table(a.table), ref_size=a.ref_size, where=str(a.table))
    out = Path(a.out) if a.out else Path(a.table).with_name(Path(a.table).stem + ".assigned" + (Path(a.table).suffix or ".csv"))
    write_table(res.table, out)
    summary = ", ".join(f"{k} {v}" for k, v in sorted(res.counts.items()))
    print(f"wrote {out}: {len(res.table)} rows ({summary}); {res.ambiguous} rows held by more than one split")
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="augsplit", description="Datasets with held-out regions of transform space.")
    p.add_argument("--version", action="version", version=f"augsplit {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    q = sub.add_parser("plan", help="print what each split will contain and prove the spec's guarantees")
    q.add_argument("spec", help="YAML spec, or 'demo' for the built-in demo spec")
    q.add_argument("--json", action="store_true", help="machine-readable output")
    q.set_defaults(run=_cmd_plan)

    q = sub.add_parser("assign", help="label the rows of a CSV/Parquet table with the split whose region holds them")
    q.add_argument("spec")
    q.add_argument("table")
    q.add_argument("--out", help="where to write the labelled table (default: <table>.assigned.<ext>)")
    q.add_argument("--ref-size", type=float, default=None, help="native object size in px, to derive scale from bboxes")
    q.set_defaults(run=_cmd_assign)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "spec", None) == "demo":
        from .spec import builtin_spec_path

        args.spec = str(builtin_spec_path("demo"))
    try:
        return int(args.run(args) or 0)
    except AugsplitError as err:
        print(f"augsplit {args.command}: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print(f"augsplit {args.command}: interrupted; rerun with --resume to continue", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
