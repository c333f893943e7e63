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


def _shard(text: str):
    try:
        k, n = (int(v) for v in text.split("/"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{text}' is not K/N (e.g. 3/8)") from None
    return (k, n)  # the range of K is checked by generate(), which names it in one line


def _cmd_generate(a) -> int:
    from .generate import Options, finalize, generate

    if a.finalize:
        summary = finalize(a.out)
    else:
        if a.spec is None:
            raise AugsplitError("give a spec (or --finalize an existing folder)")
        opts = Options(store=a.store, format=a.format, quality=a.quality, shard_size=a.shard_size, workers=a.workers,
                       resume=a.resume, overwrite=a.overwrite, progress=not a.quiet, array_shard=a.shard,
                       executor=a.executor, scheduler=a.scheduler)
        summary = generate(a.spec, a.out, opts)
    if "array_shard" in summary:
        k, n = summary["array_shard"]
        print(f"shard {k}/{n} of {a.out}: {summary['images']} images ({summary['made']} made now); "
              f"run 'augsplit generate --finalize --out {a.out}' once every shard is done")
    else:
        per = ", ".join(f"{k} {v['images']}" for k, v in summary["splits"].items())
        print(f"{a.out}: {summary['images']} images ({per}); spec {summary['spec_hash']}")
    return 0


def _cmd_verify(a) -> int:
    from .verify import verify

    rep = verify(a.dataset, sample=a.sample)
    if rep.ok:
        print(f"{a.dataset}: OK ({rep.checked} rows checked, {rep.rerendered} re-rendered identically)")
        return 0
    for p in rep.problems:
        print(f"{a.dataset}: {p}")
    return 1


def _cmd_preview(a) -> int:
    from .preview import preview

    for path in preview(a.dataset, out=a.out, per_split=a.per_split, columns=a.columns):
        print(path)
    return 0


def _cmd_score(a) -> int:
    from .score import run_score

    out = Path(a.out) if a.out else Path(a.dataset) / "score"
    run_score(a.dataset, a.predictions, out, compare=a.compare, train_split=a.train_split,
              reference_split=a.reference_split, allow_partial=a.allow_partial,
              probabilities=True if a.probabilities else None)
    print(f"wrote {out}/score.json, the curves as CSV and {out}/report.html")
    return 0


def _pair(text: str):
    a, sep, b = text.partition(":")
    if not sep or not a or not b:
        raise argparse.ArgumentTypeError(f"'{text}' is not A:B (two split names)")
    return (a, b)


def _axis(text: str):
    name, sep, rest = text.partition("=")
    parts = rest.split(":")
    try:
        lo, hi = float(parts[0]), float(parts[1])
    except (ValueError, IndexError):
        raise argparse.ArgumentTypeError(f"'{text}' is not NAME=LO:HI[:circular|:log]") from None
    kind = parts[2] if len(parts) > 2 else "linear"
    if not sep or kind not in ("linear", "circular", "log"):
        raise argparse.ArgumentTypeError(f"'{text}' is not NAME=LO:HI[:circular|:log]")
    return name, ((lo, hi, True) if kind == "circular" else (lo, hi, False, kind))


def _keyval(text: str):
    k, sep, v = text.partition("=")
    if not sep:
        raise argparse.ArgumentTypeError(f"'{text}' is not KEY=VALUE")
    import yaml

    try:
        return k, yaml.safe_load(v)
    except yaml.YAMLError:
        return k, v  # not a YAML scalar: the text itself (the threshold's type check names it)


def _named_option(exc: AugsplitError, thresholds: dict, from_option: dict) -> AugsplitError:
    """The error with the option a bad threshold or mapped name came from as its `where`,
    in place of the library's key path (thresholds.KEY, column_map.NAME)."""
    where = exc.where or ""
    head, _, key = where.partition(".")
    if head == "column_map" and key:
        where = f"{from_option.get(key, '--map')} {key}"
    elif head == "thresholds" and key:
        where = f"--threshold {key}" if key in thresholds else f"the spec's audit.{key}"
    else:
        return exc
    return type(exc)(exc.message, where=where, hint=exc.hint)


def _cmd_audit(a) -> int:
    from .audit.entry import audit_dataset, audit_table, is_dataset
    from .audit.report import summary_table, write_reports
    from .audit.run import Thresholds

    thresholds = dict(a.threshold or [])
    try:  # every value typed and range-checked before anything is read
        Thresholds.from_dict(thresholds)
    except AugsplitError as exc:
        raise _named_option(exc, thresholds, {}) from None
    column_map = dict(a.map or [])
    from_option = {k: "--map" for k in column_map}
    if a.column_map:
        from .spec import read_yaml

        loaded = read_yaml(a.column_map)
        if not isinstance(loaded, dict):
            raise AugsplitError("a column map is a mapping of augsplit names to table columns", where=a.column_map)
        column_map.update({str(k): str(v) for k, v in loaded.items()})
        from_option.update({str(k): f"--column-map {a.column_map}:" for k in loaded})
    try:
        if is_dataset(a.input) and a.spec is None and not column_map:
            result = audit_dataset(a.input, pairs=a.pair, thresholds=thresholds, exact_masks=not a.no_masks,
                                   progress=not a.quiet and sys.stderr.isatty())
            out = Path(a.out) if a.out else Path(a.input) / "audit"
        else:
            result = audit_table(a.input, spec_path=a.spec, pairs=a.pair, axes=dict(a.axis or []) or None,
                                 column_map=column_map or None, thresholds=thresholds,
                                 progress=not a.quiet and sys.stderr.isatty())
            out = Path(a.out) if a.out else Path("audit")
    except AugsplitError as exc:
        raise _named_option(exc, thresholds, from_option) from None
    paths = write_reports(result, out)
    print(summary_table(result))
    print(f"wrote {paths['json']} and {paths['html']}")
    return result.exit_code


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

    q = sub.add_parser("generate", help="render the dataset a spec describes, with its Parquet manifest")
    q.add_argument("spec", nargs="?", help="YAML spec, or 'demo'")
    q.add_argument("--out", required=True, help="output folder")
    q.add_argument("--store", choices=["files", "parquet", "none"], default="files",
                   help="image files, encoded images inside the Parquet rows, or none (the manifest re-makes them)")
    q.add_argument("--format", choices=["png", "jpeg", "webp"], default="png")
    q.add_argument("--quality", type=int, default=95, help="JPEG/WebP quality")
    q.add_argument("--workers", type=int, default=1, help="worker processes (local, or of a new dask LocalCluster)")
    q.add_argument("--executor", choices=["auto", "serial", "processes", "dask"], default="auto",
                   help="where shards run: auto = serial for 1 worker, local processes otherwise")
    q.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="dask scheduler address (implies --executor dask); without it dask starts a LocalCluster")
    q.add_argument("--shard-size", type=int, default=500, help="images per shard (one manifest part each)")
    q.add_argument("--resume", action="store_true", help="continue an interrupted run")
    q.add_argument("--overwrite", action="store_true", help="replace an existing dataset folder")
    q.add_argument("--shard", type=_shard, default=None, metavar="K/N", help="make only job-array shard K of N")
    q.add_argument("--finalize", action="store_true", help="check all shards are present and write the summary")
    q.add_argument("--quiet", action="store_true", help="no progress bar")
    q.set_defaults(run=_cmd_generate)

    q = sub.add_parser("verify", help="check a dataset folder against its spec; exit 1 on any difference")
    q.add_argument("dataset")
    q.add_argument("--sample", type=int, default=None, help="re-render only this many random rows")
    q.set_defaults(run=_cmd_verify)

    q = sub.add_parser("preview", help="contact sheets per split and a map of where each split's objects landed (PNG)")
    q.add_argument("dataset")
    q.add_argument("--out", default=None, help="folder for the PNG files (default: DATASET/preview)")
    q.add_argument("--per-split", type=int, default=24, help="images on each contact sheet")
    q.add_argument("--columns", type=int, default=6, help="images per row of a contact sheet")
    q.set_defaults(run=_cmd_preview)

    q = sub.add_parser("score", help="accuracy per split, class and cell, and against distance from the training region")
    q.add_argument("dataset", help="an augsplit dataset folder")
    q.add_argument("predictions", help="CSV/Parquet: image_id and a predicted class (optional score_<class> columns)")
    q.add_argument("--compare", help="a second predictions file to lay side by side")
    q.add_argument("--out", help="report folder (default: DATASET/score)")
    q.add_argument("--train-split", help="the training split (default: from the dataset)")
    q.add_argument("--reference-split", help="the i.i.d. split the gaps are measured from")
    q.add_argument("--allow-partial", action="store_true", help="score even when some images have no prediction")
    q.add_argument("--probabilities", action="store_true", help="score columns are probabilities (rows sum to one)")
    q.set_defaults(run=_cmd_score)

    q = sub.add_parser("audit", help="check a dataset, parameter log or table for train/test leakage; exit 1 on a failure")
    q.add_argument("input", help="an augsplit dataset folder, a parameter log folder, or a CSV/Parquet table")
    q.add_argument("--spec", help="the spec whose axes, regions and guarantees the input is checked against")
    q.add_argument("--pair", type=_pair, action="append", metavar="A:B", help="splits to compare (repeatable; default: train against each other split)")
    q.add_argument("--axis", type=_axis, action="append", metavar="NAME=LO:HI[:circular|:log]", help="an axis to audit when there is no spec")
    q.add_argument("--map", type=lambda t: tuple(t.split("=", 1)) if "=" in t else _keyval(t), action="append",
                   metavar="NAME=COLUMN", help="take augsplit's NAME from the table's COLUMN (repeatable)")
    q.add_argument("--column-map", help="a YAML file mapping augsplit names to table columns")
    q.add_argument("--threshold", type=_keyval, action="append", metavar="KEY=VALUE",
                   help="e.g. margin=0.05, hash_radius=6, footprint_max_fraction=0.01, duplicate_judge=radius "
                        "(also settable in the spec's audit:)")
    q.add_argument("--out", help="where audit.json and audit.html go (default: DATASET/audit or ./audit)")
    q.add_argument("--no-masks", action="store_true", help="use bounding boxes as footprints (faster, coarser)")
    q.add_argument("--quiet", action="store_true", help="no progress bars")
    q.set_defaults(run=_cmd_audit)
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
