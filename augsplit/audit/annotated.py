"""Audit an annotated dataset (COCO JSON, YOLO or VOC folder, or a table of boxes) split by a
given assignment: footprint overlap from its real boxes or masks, parameter proximity and
near-duplicate images, with the same checks, verdicts and exit codes as generated data.

With a spec, the spec's axes, regions and claims apply (a footprint claim fails on overlap);
without one, positions are fractions of each image and nothing is claimed (overlap warns).
"""

from __future__ import annotations

import dataclasses
from functools import lru_cache


from ..errors import DatasetError
from .entry import _claims, _merge, _pairs, _thresholds
from .inputs import read_image
from .result import AuditResult
from .run import run_audit



def audit_annotated(source, splits, spec_path=None, pairs=None, thresholds: dict | None = None,
                    ref_size: float | None = None, images_root=None, fmt: str = "auto",
                    exact_masks: bool = True, progress: bool = False, boxes=None) -> AuditResult:
    """`source`: the annotations, read as `assign` reads them (`fmt`; `boxes`: a table's box
    convention, units and columns, formats.placement.BoxOptions; a table without image sizes
    takes the spec's canvas); `splits`: the assignment (see formats.write.read_assignment)."""
    from ..formats.audit_input import audit_input
    from ..formats.placement import BoxOptions, open_objects
    from ..formats.write import read_assignment

    plan = None
    if spec_path is not None:
        from ..build import open_spec

        plan = open_spec(spec_path, for_data=True).plan
    size = (plan.canvas.width, plan.canvas.height) if plan is not None else None
    objs = open_objects(source, fmt, boxes or BoxOptions(), images_root, size)
    if not hasattr(objs, "objects"):
        raise DatasetError("no boxes found: a table needs box columns (see --boxes)", where=str(source))
    data = audit_input(objs, read_assignment(splits, objs), plan, ref_size)
    wanted = _wanted_pairs(plan, pairs, list(dict.fromkeys(data.table["split"])), splits)
    image_loader, notes = _image_loader(data.image_paths, data.image_root)

    base = _thresholds(plan, thresholds)
    results = []
    for a, b in wanted:
        claims = _claims(plan, a, b) if plan is not None else {}
        declared = {a: plan.split(a).region, b: plan.split(b).region} if claims else None
        results.append(run_audit(data.table, data.axes, pairs=[(a, b)], thresholds=dict(base, **claims),
                                 image_loader=image_loader, mask_loader=data.mask_loader if exact_masks else None,
                                 canvas_hw=data.canvas_hw, regions=declared, mask_rows=data.mask_rows,
                                 progress=progress))
    merged = _merge(results)
    if image_loader is None:  # say why in the terminal too, in the user's terms
        merged = dataclasses.replace(merged, skipped=tuple(
            dataclasses.replace(k, reason=notes[0]) if k.name == "near_duplicates" else k for k in merged.skipped))
    inputs = dict(merged.inputs, source=str(source), format=objs.kind, splits=str(splits),
                  notes=list(merged.inputs.get("notes", [])) + list(data.notes) + notes)
    return dataclasses.replace(merged, inputs=inputs)


def _wanted_pairs(plan, pairs, labelled: list, splits) -> list:
    """The pairs to audit: the spec's (or those named), else "train" against every other
    labelled split; each split named must have images in the assignment."""
    from ..assign import LABELS

    present = [s for s in labelled if s not in LABELS]
    if plan is not None:
        wanted = _pairs(plan, pairs)
    elif pairs:
        wanted = [tuple(p) for p in pairs]
    else:
        if "train" not in present:
            raise DatasetError(f"no 'train' split to audit against (splits: {', '.join(present) or 'none'})",
                               where=str(splits), hint="name the pairs with --pair A:B")
        wanted = [("train", s) for s in present if s != "train"]
    if not wanted:
        raise DatasetError(f"nothing to compare: the assignment puts images in one split only ({', '.join(present)})",
                           where=str(splits))
    for a, b in wanted:
        for s in (a, b):
            if s not in labelled:
                raise DatasetError(f"split {s!r} has no images in the assignment (it has {', '.join(present)})",
                                   where=f"pair {a}:{b}")
    return wanted


def _image_loader(paths, root):
    """Objects' images, decoded once per file while neighbouring rows share it, each read
    inside the dataset's folder `root` (inputs.read_image). No image file at all: no loader
    (near-duplicates are skipped, with a note); some missing: an error."""
    from ..formats.boxes import dataset_box

    box = dataset_box(root)  # the names image_path resolved inside root
    exists = {p: p is not None and p.is_file() for p in set(paths)}
    found = [p for p, ok in exists.items() if ok]
    if not found:
        first = next((p for p in paths if p is not None), None)
        if first is None:
            return None, ["the annotations name no image files (a table needs a file column): near-duplicates "
                          "not checked"]
        return None, [f"no image files found (e.g. {first}): near-duplicates not checked; give --images"]
    missing = sorted(str(p) for p, ok in exists.items() if not ok)
    if missing:
        raise DatasetError(f"{len(missing)} images missing or named by no file (of {len(exists)})", where=missing[0])

    @lru_cache(maxsize=32)
    def image(path):
        return read_image(box, path.relative_to(root).as_posix())  # a regular file, with the size limit

    return (lambda i: image(paths[int(i)])), []
