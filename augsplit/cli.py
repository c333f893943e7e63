"""The `augsplit` command: parse arguments, call one library function, map errors to exit codes.

Exit codes: 0 success; 1 an audit or verification found a failure; 2 bad input.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from contextlib import contextmanager
from pathlib import Path

from . import __version__
from .errors import AugsplitError


def _warn(command: str, plan, strict: bool, echo: bool = True) -> None:
    """Each plan warning as one line on stderr (unless the output shows them already);
    under --strict they are an error (exit 2)."""
    for w in plan.warnings if echo else ():
        print(f"augsplit {command}: warning: {w}", file=sys.stderr)
    if strict and plan.warnings:
        raise AugsplitError(f"the spec has {len(plan.warnings)} plan warning(s), errors under --strict", where="--strict")


def _cmd_plan(a) -> int:
    from .build import open_spec
    from .plan.describe import plan_data, plan_text

    plan = open_spec(a.spec).plan
    print(json.dumps(plan_data(plan), indent=2) if a.json else plan_text(plan))
    _warn("plan", plan, a.strict, echo=False)  # the plan lists them
    return 0


def _cmd_assign(a) -> int:
    from .formats.placement import split_input
    from .formats.write import write_result
    from .io import is_stdout, refuse_input

    if a.out:
        refuse_input(a.out, a.table)  # never the input itself: refused before any work
    res = split_input(a.spec, a.table, fmt=a.format, ref_size=a.ref_size, mixed=a.mixed,
                      boxes=_box_options(a), images_root=a.images, replace_split=a.replace_split)
    paths = write_result(res, a.table, a.out, a.replace_split)
    said = sys.stderr if is_stdout(a.out or "") else sys.stdout  # with --out -, stdout carries only the table
    for line in res.summary():
        print(line, file=said)
    print("wrote " + ", ".join("stdout" if is_stdout(p) else str(p) for p in paths), file=said)
    return 0


# how users' annotated data is read, the same for assign and audit: option -> its default
ANNOTATION_DEFAULTS = {"format": "auto", "boxes": None, "box_units": "px", "box_columns": None, "images": None}


def _annotation_options(q) -> None:
    """The options of ANNOTATION_DEFAULTS."""
    d = ANNOTATION_DEFAULTS
    q.add_argument("--format", choices=["auto", "coco", "yolo", "voc", "table"], default=d["format"],
                   help="the input's format (default: from the file or folder)")
    q.add_argument("--boxes", choices=["xyxy", "xywh", "cxcywh"], default=d["boxes"],
                   help="a table's box convention: corners, top-left corner and size, or centre and size")
    q.add_argument("--box-units", choices=["px", "norm"], default=d["box_units"],
                   help="a table's box units: px of its image, or fractions of its width and height")
    q.add_argument("--box-columns", default=d["box_columns"], metavar="A,B,C,D",
                   help="a table's four box columns, in convention order")
    q.add_argument("--images", default=d["images"], metavar="DIR",
                   help="folder a COCO file's or a table's image paths resolve in (default: the file's folder)")


def _box_options(a):
    from .formats.placement import BoxOptions

    cols = tuple(c.strip() for c in a.box_columns.split(",")) if a.box_columns else None
    return BoxOptions(a.boxes, a.box_units, cols)


def _size_px(text: str) -> float:
    """A positive, finite size in px (--ref-size)."""
    try:
        v = float(text)
    except ValueError:
        v = float("nan")
    if not (math.isfinite(v) and v > 0):
        raise argparse.ArgumentTypeError(f"'{text}' is not a positive size in px (e.g. 32)")
    return v


def _shard(text: str):
    try:
        k, n = (int(v) for v in text.split("/"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{text}' is not K/N (e.g. 3/8)") from None
    return (k, n)  # the range of K is checked by generate(), which names it in one line


def _cmd_generate(a) -> int:
    from .generate import Options, check_options, finalize, generate
    from .io import check_folder_target

    check_folder_target(a.out)
    if a.finalize:
        summary = finalize(a.out)
    else:
        if a.spec is None:
            raise AugsplitError("give a spec (or --finalize an existing folder)")
        from .build import open_spec

        opts = Options(store=a.store, format=a.format, quality=a.quality, png_deflate=a.png_deflate,
                       png_level=a.png_level, shard_size=a.shard_size,
                       workers=a.workers,
                       resume=a.resume, overwrite=a.overwrite, progress=not a.quiet, array_shard=a.shard,
                       executor=a.executor, scheduler=a.scheduler, force_workers=a.force_workers)
        check_options(opts)  # a bad option is named before the spec is read
        built = open_spec(a.spec)
        _warn("generate", built.plan, a.strict)  # before anything is written
        summary = generate(a.spec, a.out, opts, built=built)
    if "array_shard" in summary:
        k, n = summary["array_shard"]
        print(f"shard {k}/{n} of {a.out}: {summary['images']} images ({summary['made']} made now); "
              f"run 'augsplit generate --finalize --out {a.out}' once every shard is done")
    else:
        per = ", ".join(f"{k} {v['images']}" for k, v in summary["splits"].items())
        print(f"{a.out}: {summary['images']} images ({per}); spec {summary['spec_hash']}")
        low = summary.get("low_visibility")
        if low and low["below"]:
            print(f"augsplit generate: warning: {low['below']} of {summary['images']} images show less than "
                  f"{low['threshold']:.0%} of their object (visible_fraction), {low['zero']} none of it",
                  file=sys.stderr)
    return 0


def _cmd_verify(a) -> int:
    from .verify import verify

    rep = verify(a.dataset, sample=a.sample, allow_incomplete=a.allow_incomplete, workers=a.workers,
                 executor=a.executor, scheduler=a.scheduler, progress=not a.quiet)
    for p in rep.problems:
        print(f"{a.dataset}: {p}")
    if rep.ok:
        print(f"{a.dataset}: OK ({rep.checked} rows checked, {rep.rerendered} re-rendered identically)")
    for s in rep.skipped:  # never a silent pass: what was not checked is said
        print(f"{a.dataset}: not checked: {s}")
    return 0 if rep.ok else 1


def _out_option(out) -> Path:
    """The --out folder, checked before any work (a usable target whose parent exists); an
    error names the option."""
    from .io import check_folder_target

    try:
        p = check_folder_target(out)
        if not p.absolute().parent.is_dir():
            raise AugsplitError("cannot write: no such folder", where=str(p.absolute().parent))
        return p
    except AugsplitError as err:
        raise type(err)(err.message, where=f"--out {err.where or out}", hint=err.hint) from None


def _cmd_preview(a) -> int:
    from .preview import preview

    if a.out is not None:
        _out_option(a.out)
    for path in preview(a.dataset, out=a.out, per_split=a.per_split, columns=a.columns,
                        allow_incomplete=a.allow_incomplete):
        print(path)
    return 0


def _cmd_score(a) -> int:
    from .io import is_stdout
    from .report_folder import check_report_folder
    from .score import run_score
    from .score.report import report_names
    from .score.run import labels_of, prediction_paths

    out = Path(a.dataset) / "score" if a.out is None else a.out if is_stdout(a.out) else _out_option(a.out)
    if not is_stdout(out):  # every file it would write, refused before the work, not after
        paths = prediction_paths(a.predictions, a.compare)
        check_report_folder(out, report_names(labels_of(paths)), [a.dataset, *paths])
    run_score(a.dataset, a.predictions, out, compare=a.compare, train_split=a.train_split,
              reference_split=a.reference_split, allow_partial=a.allow_partial,
              probabilities=True if a.probabilities else None, echo=not is_stdout(out))
    if not is_stdout(out):
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
    from .audit.report import REPORT_FILES, summary_table, write_reports
    from .audit.run import Thresholds
    from .io import is_stdout
    from .report_folder import check_report_folder

    inputs = [p for p in (a.input, a.splits, a.spec, a.column_map) if p is not None]
    if a.out is not None and not is_stdout(a.out):
        check_report_folder(a.out, REPORT_FILES, inputs)  # refused before the work, not after

    thresholds = dict(a.threshold or [])
    try:  # every value typed and range-checked before anything is read
        Thresholds.from_dict(thresholds)
    except AugsplitError as exc:
        raise _named_option(exc, thresholds, {}) from None
    column_map, from_option = _audit_column_map(a)
    try:
        result, out = _audit_input(a, thresholds, column_map, progress=not a.quiet and sys.stderr.isatty())
    except AugsplitError as exc:
        raise _named_option(exc, thresholds, from_option) from None
    paths = write_reports(result, out, inputs)
    if not is_stdout(out):  # with '-', stdout carries only audit.json
        print(summary_table(result))
        print(f"wrote {paths['json']} and {paths['html']}")
    return result.exit_code


def _audit_column_map(a) -> tuple[dict, dict]:
    """The audit's column map (--map, then --column-map's file) and, per key, the option it came from."""
    column_map = dict(a.map or [])
    from_option = {k: "--map" for k in column_map}
    if a.column_map:
        from .spec import read_yaml

        loaded = read_yaml(a.column_map)
        if not isinstance(loaded, dict):
            raise AugsplitError("a column map is a mapping of augsplit names to table columns", where=a.column_map)
        column_map.update({str(k): str(v) for k, v in loaded.items()})
        from_option.update({str(k): f"--column-map {a.column_map}:" for k in loaded})
    return column_map, from_option


def _audit_input(a, thresholds: dict, column_map: dict, progress: bool):
    """Audit the input by its kind (annotations with a split assignment, an augsplit dataset, or
    a table); the result and the report folder."""
    from .audit.entry import audit_dataset, audit_table
    from .dataset.layout import is_dataset

    if a.splits is not None or a.format in ("coco", "yolo", "voc") or _annotated(a.input):
        from .audit.annotated import audit_annotated

        if a.splits is None:
            raise AugsplitError("give the split assignment with --splits (the folder `augsplit assign` wrote, "
                                "per-split files, or a table with a split column)", where=str(a.input))
        _no_executor(a)
        result = audit_annotated(a.input, a.splits, spec_path=a.spec, pairs=a.pair, thresholds=thresholds,
                                 ref_size=a.ref_size, images_root=a.images, fmt=a.format, boxes=_box_options(a),
                                 exact_masks=not a.no_masks, progress=progress)
        return result, a.out or Path("audit")
    given = ["--" + k.replace("_", "-") for k, default in ANNOTATION_DEFAULTS.items() if getattr(a, k) != default]
    if given:  # refused, not ignored
        raise AugsplitError("reads annotated data audited with --splits (COCO, YOLO, VOC or a table of boxes); "
                            "this input is a dataset folder or a table with its split column", where=given[0])
    if is_dataset(a.input) and a.spec is None and not column_map:
        result = audit_dataset(a.input, pairs=a.pair, thresholds=thresholds, exact_masks=not a.no_masks,
                               progress=progress, workers=a.workers, executor=a.executor, scheduler=a.scheduler)
        return result, a.out or Path(a.input) / "audit"
    _no_executor(a)
    result = audit_table(a.input, spec_path=a.spec, pairs=a.pair, axes=dict(a.axis or []) or None,
                         column_map=column_map or None, thresholds=thresholds, progress=progress)
    return result, a.out or Path("audit")


def _no_executor(a) -> None:
    """The executor options run a dataset folder's image work; elsewhere they are refused, not ignored."""
    given = [o for o, v in (("--workers", a.workers != 1), ("--executor", a.executor != "auto"),
                            ("--scheduler", a.scheduler)) if v]
    if given:
        raise AugsplitError("runs the image work of an augsplit dataset folder only (audited here without a "
                            "--spec or --map); this input is audited in one process", where=given[0])


def _annotated(path) -> bool:
    """A COCO JSON file or a YOLO / VOC folder (not an augsplit dataset or a table)."""
    from .dataset.layout import is_dataset
    from .formats.placement import detect_format

    return Path(path).exists() and not is_dataset(path) and detect_format(path) in ("coco", "yolo", "voc")


def _cmd_export(a) -> int:
    from .formats.export import export

    res = export(a.dataset, a.out, a.to, per_shard=a.per_shard, progress=not a.quiet and sys.stderr.isatty())
    per = ", ".join(f"{k} {v['images']} images / {v['objects']} objects" for k, v in res["splits"].items())
    print(f"{res['out']}: {a.to} export ({per}); {res['files']} files")
    return 0


class _ShowDefaults(argparse.HelpFormatter):
    """Every option's help ends with its default, unless it has none (None or a flag's False)
    or the help already names it."""

    @staticmethod
    def shown(action) -> bool:
        return (action.default not in (None, False, argparse.SUPPRESS)
                and bool(action.option_strings or action.nargs in ("?", "*")))

    def _get_help_string(self, action):
        text = action.help or ""
        return text + " (default: %(default)s)" if self.shown(action) and "default" not in text else text

    @classmethod
    def apply(cls, parser: argparse.ArgumentParser) -> None:
        parser.formatter_class = cls
        for action in parser._actions:
            if action.help is None and cls.shown(action):  # argparse shows no line for help=None
                action.help = "(default: %(default)s)"


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line naming the option (not the usage block), exit 2.
    Subcommand parsers are made of the same class (argparse's add_subparsers default)."""

    def error(self, message: str):
        self.exit(2, f"{self.prog}: error: {_one_line(message)} (see '{self.prog} --help')\n")


def _one_line(text: str) -> str:
    return str(text).replace("\r", "\\r").replace("\n", "\\n")


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="augsplit", description="Datasets with held-out regions of transform space.")
    p.add_argument("--version", action="version", version=f"augsplit {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    q = sub.add_parser("plan", help="print what each split will contain and prove the spec's guarantees")
    q.add_argument("spec", help="YAML spec, or 'demo' for the built-in demo spec")
    q.add_argument("--json", action="store_true", help="machine-readable output")
    q.add_argument("--strict", action="store_true", help="treat plan warnings as errors (exit 2)")
    q.set_defaults(run=_cmd_plan)

    q = sub.add_parser("assign", help="split a table, COCO JSON, YOLO or VOC folder by where its objects lie")
    q.add_argument("spec", help="YAML spec (a spec that only splits existing data may leave out objects:)")
    q.add_argument("table", help="CSV, TSV or Parquet table (file or folder), COCO JSON file, YOLO labels folder or VOC XML folder")
    q.add_argument("--out", help="the labelled table: .csv, .tsv or .parquet (default: <table>.assigned.<ext>, Parquet "
                                 "for a Parquet input; '-' prints it as CSV to stdout; never the input itself), or the "
                                 "folder for per-split files of COCO/YOLO/VOC input (default: <input>.splits beside it)")
    _annotation_options(q)
    q.add_argument("--mixed", choices=["drop", "keep", "largest"], default="drop",
                   help="an image whose objects lie in different splits: drop it, keep it in a 'mixed' split, "
                        "or give it its largest object's split")
    q.add_argument("--replace-split", action="store_true", help="replace a table's existing split column")
    q.add_argument("--ref-size", type=_size_px, default=None,
                   help="native object size in px of the spec's canvas, to derive scale from boxes (only where a split depends on scale)")
    q.set_defaults(run=_cmd_assign)

    q = sub.add_parser("generate", help="render the dataset a spec describes, with its Parquet manifest")
    q.add_argument("spec", nargs="?", help="YAML spec, or 'demo'")
    q.add_argument("--out", required=True, help="output folder (a real folder, not a symlink, file or '-')")
    q.add_argument("--store", choices=["files", "parquet", "tar", "none"], default="files",
                   help="image files, encoded images inside the Parquet rows, one tar per shard of (image, JSON "
                        "row) members, or none (the manifest re-makes them)")
    q.add_argument("--format", choices=["png", "jpeg", "webp"], default="png")
    q.add_argument("--quality", type=int, default=95, help="JPEG quality 0-100, WebP 1-100 (PNG: unused, 0-100)")
    q.add_argument("--png-deflate", choices=["isal", "zlib"], default=None,
                   help="the library that deflates PNG files ('up' row filter first); default: zlib on noise "
                        "backgrounds (0.55-0.9x isal's bytes), isal elsewhere (smaller and 2-3x faster there)")
    q.add_argument("--png-level", type=int, default=None,
                   help="PNG deflate level: isal 0-2 (default 2), zlib 0-9 (default 1); the top level packs "
                        "hardest, zlib's 0 stores raw; the pixels are the same at every setting")
    q.add_argument("--workers", type=int, default=1,
                   help="worker processes (local, or of a new dask LocalCluster); at most one per shard and per CPU core")
    q.add_argument("--force-workers", action="store_true",
                   help="start --workers processes even beyond the shards or cores (at most 256)")
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
    q.add_argument("--strict", action="store_true", help="treat plan warnings as errors (exit 2, nothing written)")
    q.set_defaults(run=_cmd_generate)

    q = sub.add_parser("verify", help="check a dataset folder against its spec; exit 1 on any difference")
    q.add_argument("dataset")
    q.add_argument("--sample", type=int, default=None,
                   help="re-render only this many random rows (every stored image is still read and checked)")
    q.add_argument("--allow-incomplete", action="store_true",
                   help="check an unfinished folder too (what is made so far; its missing summary is reported)")
    _executor_options(q, "the per-part checks")
    q.add_argument("--quiet", action="store_true", help="no progress bar")
    q.set_defaults(run=_cmd_verify)

    q = sub.add_parser("preview", help="contact sheets per split and a map of where each split's objects landed (PNG)")
    q.add_argument("dataset")
    q.add_argument("--out", default=None,
                   help="folder for the PNG files (default: DATASET/preview; its parent must exist)")
    q.add_argument("--per-split", type=int, default=24, help="images on each contact sheet")
    q.add_argument("--columns", type=int, default=6, help="images per row of a contact sheet")
    q.add_argument("--allow-incomplete", action="store_true", help="preview an unfinished folder (what is made so far)")
    q.set_defaults(run=_cmd_preview)

    q = sub.add_parser("score", help="accuracy per split, class and cell, and against distance from the training region")
    q.add_argument("dataset", help="an augsplit dataset folder")
    q.add_argument("predictions", help="CSV, TSV or Parquet: image_id and a predicted class (optional score_<class> "
                   "columns)")
    q.add_argument("--compare", help="a second predictions file to lay side by side")
    q.add_argument("--out", help="report folder (default: DATASET/score; its parent must exist); "
                   "'-' prints score.json to stdout and writes no CSV or HTML")
    q.add_argument("--train-split", help="the training split (default: from the dataset)")
    q.add_argument("--reference-split", help="the i.i.d. split the gaps are measured from")
    q.add_argument("--allow-partial", action="store_true", help="score even when some images have no prediction")
    q.add_argument("--probabilities", action="store_true", help="score columns are probabilities (rows sum to one)")
    q.set_defaults(run=_cmd_score)

    q = sub.add_parser("audit", help="check a dataset, parameter log or table for train/test leakage; exit 1 on a failure")
    q.add_argument("input", help="an augsplit dataset folder, a parameter log folder, a CSV, TSV or Parquet table, "
                                 "or a COCO JSON file / YOLO folder / VOC folder (with --splits)")
    q.add_argument("--splits", default=None, help="for annotated data: the folder `augsplit assign` wrote, a folder of "
                                                  "<split>.json / <split>.txt files, or a table with image_id and split")
    _annotation_options(q)
    q.add_argument("--ref-size", type=_size_px, default=None, help="native object size in px of the spec's canvas, to audit scale")
    q.add_argument("--spec", help="the spec whose axes, regions and guarantees the input is checked against")
    q.add_argument("--pair", type=_pair, action="append", metavar="A:B", help="splits to compare (repeatable; default: train against each other split)")
    q.add_argument("--axis", type=_axis, action="append", metavar="NAME=LO:HI[:circular|:log]", help="an axis to audit when there is no spec")
    q.add_argument("--map", type=lambda t: tuple(t.split("=", 1)) if "=" in t else _keyval(t), action="append",
                   metavar="NAME=COLUMN", help="take augsplit's NAME from the table's COLUMN (repeatable)")
    q.add_argument("--column-map", help="a YAML file mapping augsplit names to table columns")
    q.add_argument("--threshold", type=_keyval, action="append", metavar="KEY=VALUE",
                   help="e.g. margin=0.05, hash_radius=6, footprint_max_fraction=0.01, duplicate_judge=radius "
                        "(also settable in the spec's audit:)")
    q.add_argument("--out", help="folder for audit.json and audit.html (default: DATASET/audit or ./audit; its "
                   "parent must exist); '-' prints audit.json to stdout and writes no HTML")
    q.add_argument("--no-masks", action="store_true", help="use bounding boxes as footprints (faster, coarser)")
    _executor_options(q, "a dataset folder's image hashes and footprint masks")
    q.add_argument("--quiet", action="store_true", help="no progress bars")
    q.set_defaults(run=_cmd_audit)

    q = sub.add_parser("export", help="write a finished dataset as COCO JSON, YOLO, tar shards or a Hugging Face layout")
    q.add_argument("dataset", help="an augsplit dataset folder (any --store)")
    q.add_argument("--to", required=True, choices=["coco", "yolo", "yolo-seg", "tar", "hf"],
                   help="coco: <split>.json with RLE masks; yolo / yolo-seg: images/, labels/, data.yaml; tar: "
                        "shards of (image, JSON row) pairs; hf: data/<split>-*.parquet and a README.md dataset card")
    q.add_argument("--out", required=True, help="export folder: new, empty or an earlier export (its parent must exist)")
    q.add_argument("--per-shard", type=int, default=1000, help="images per tar shard or Parquet file")
    q.add_argument("--quiet", action="store_true", help="no progress bar")
    q.set_defaults(run=_cmd_export)
    for q in sub.choices.values():  # one mechanism for every subcommand: defaults shown in --help
        _ShowDefaults.apply(q)
    return p


def _executor_options(q, what: str) -> None:
    """--workers, --executor and --scheduler: where `what` runs (verify and audit; generate
    has its own, with --force-workers)."""
    q.add_argument("--workers", type=int, default=1, help="worker processes (local, or of a new dask LocalCluster)")
    q.add_argument("--executor", choices=["auto", "serial", "processes", "dask"], default="auto",
                   help=f"where {what} run: auto = serial for 1 worker, local processes otherwise")
    q.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="dask scheduler address (implies --executor dask); without it dask starts a LocalCluster")


@contextmanager
def _quiet_native_stderr():
    """Native libraries write their own warnings straight to file descriptor 2 (OpenCV's
    "[ WARN]"/"[ERROR]" log, libpng's "libpng error: ...", libjpeg's "Corrupt JPEG data"),
    after which augsplit reports the problem in one line anyway. For the command's duration
    descriptor 2 points at the null device; Python's sys.stderr, if it is that descriptor,
    is moved to a copy of it, so augsplit's own messages and progress bars still show.
    Both are restored when the command returns (a library call never changes either)."""
    try:
        sys.stderr.flush()
        real = os.dup(2)
    except (OSError, ValueError, AttributeError):  # no descriptor 2 to protect
        yield
        return
    try:
        swap = sys.stderr.fileno() == 2
    except (OSError, ValueError, AttributeError):  # e.g. a notebook's or a test's stream object
        swap = False
    old = sys.stderr
    if swap:
        sys.stderr = open(os.dup(real), "w", buffering=1, encoding=old.encoding, errors="backslashreplace")
    null = os.open(os.devnull, os.O_WRONLY)
    os.dup2(null, 2)
    os.close(null)
    try:
        yield
    finally:
        if swap:
            # flushed, not closed: a logging handler made during the command (dask's) may
            # still hold it and write at exit; it is a copy of the real stderr
            sys.stderr.flush()
            sys.stderr = old
        os.dup2(real, 2)
        os.close(real)


# what to do after a Ctrl-C, for the commands that leave something to finish
AFTER_INTERRUPT = {"generate": "; rerun with --resume to continue",
                   "export": "; run the same command again to finish the export"}


def _who(command: str | None) -> str:
    return f"augsplit {command}" if command else "augsplit"


def main(argv=None) -> int:
    command = None  # a Ctrl-C may come while the options are still being read
    try:
        args = build_parser().parse_args(argv)
        command = args.command
        if getattr(args, "spec", None) == "demo":
            from .spec import builtin_spec_path

            args.spec = str(builtin_spec_path("demo"))
        with _quiet_native_stderr():
            return int(args.run(args) or 0)
    except AugsplitError as err:
        print(f"{_who(command)}: error: {_one_line(err)}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print(f"{_who(command)}: interrupted{AFTER_INTERRUPT.get(command, '')}", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
