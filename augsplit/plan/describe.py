"""A plan as plain data (for --json) and as text (for the terminal), in the spec's units."""

from __future__ import annotations

from ..space.axes import LEVELS
from ..io import plain
from .kinds import projection
from .planner import Plan, SplitPlan
from .regions import CLASS


def _interval(ax, lo_t, hi_t):
    if ax.measure == LEVELS:
        return {"levels": [v for i, v in enumerate(ax.levels) if lo_t - 1e-9 <= i <= hi_t + 1e-9]}
    a, b = ax.t_to_interval(lo_t, hi_t)
    return [round(a, 6), round(b, 6)]


def split_data(plan: Plan, s: SplitPlan) -> dict:
    space = plan.space
    axes = {}
    for i, ax in enumerate(space.axes):
        if ax.name == CLASS:
            continue
        axes[ax.name] = {"unit": ax.unit, "intervals": [_interval(ax, a, b) for a, b in projection(s.region, i)]}
    classes = {plan.classes[c]: n for c, n in enumerate(s.counts) if n}
    boxes = []
    for k in range(s.region.nbox):
        box = {}
        for i, ax in enumerate(space.axes):
            if ax.name == CLASS:
                box["classes"] = [plan.classes[c] for c in range(len(plan.classes)) if s.region.lo[k, i] - 1e-9 <= c <= s.region.hi[k, i] + 1e-9]
            else:
                box[ax.name] = _interval(ax, s.region.lo[k, i], s.region.hi[k, i])
        boxes.append(box)
    product = 1.0
    for i, ax in enumerate(space.axes):
        product *= sum(b - a for a, b in projection(s.region, i)) / space.t_span[i]
    out = {"name": s.name, "index": s.index, "role": s.role, "kind": s.kind, "mass": s.region.mass(),
           "is_product": abs(product - s.region.mass()) < 1e-9,
           "images": s.total, "per_class": classes, "instances": s.instances, "axes": axes, "boxes": boxes}
    if s.evidence:
        unseen = {}
        for n, ivs in s.evidence.get("unseen", {}).items():
            if n == CLASS:  # class indices -> names
                unseen[n] = [plan.classes[c] for c in range(len(plan.classes)) if any(a - 1e-9 <= c <= b + 1e-9 for a, b in ivs)]
            else:
                unseen[n] = [_interval(space[n], a, b) for a, b in ivs]
        out["evidence"] = {"shared_mass_fraction": s.evidence.get("shared_mass_fraction"), "unseen": unseen}
    return out


def plan_data(plan: Plan) -> dict:
    return plain({
        "spec_hash": plan.hash,
        "seed": plan.seed,
        "canvas": {"width": plan.canvas.width, "height": plan.canvas.height},
        "classes": list(plan.classes),
        "axes": {ax.name: {"range": [ax.lo, ax.hi], "unit": ax.unit, "measure": ax.measure}
                 for ax in plan.space.axes if ax.name != CLASS},
        "splits": [split_data(plan, s) for s in plan.splits],
        "guarantees": [{"disjoint": v.kind, "between": list(v.between), "per_class": v.per_class,
                        "verdict": v.status, "numbers": v.numbers, "message": v.message} for v in plan.verdicts],
        "warnings": [w.as_dict() for w in plan.warnings],
    })


MAX_BOXES = 8


def plan_text(plan: Plan) -> str:
    d = plan_data(plan)
    lines = [f"spec {d['spec_hash']}  seed {d['seed']}  canvas {d['canvas']['width']}x{d['canvas']['height']}  "
             f"{len(d['classes'])} classes"]
    lines.append("axes: " + ", ".join(f"{n} [{a['range'][0]:g}, {a['range'][1]:g}] {a['unit']} ({a['measure']})".replace("  ", " ")
                                      for n, a in d["axes"].items()))
    for s in d["splits"]:
        lines += _split_lines(d, s)
    for g in d["guarantees"]:
        pc = " per class" if g["per_class"] else ""
        lines.append(f"\nguarantee disjoint {g['disjoint']}{pc} {g['between'][0]} ~ {g['between'][1]}: "
                     f"{g['verdict'].upper()}  {g['message']}")
    if d["warnings"]:
        lines.append(f"\n{len(d['warnings'])} warning(s): the spec cannot do all it seems to say")
        lines += [f"  warning [{w['code']}] {w['message']}" for w in d["warnings"]]
    return "\n".join(lines)


def _split_lines(d: dict, s: dict) -> list[str]:
    """The text of one split of `plan_data`: its header, intervals, boxes and evidence."""
    counts = sorted(set(s["per_class"].values()))
    per = (f"{counts[0]} per class x {len(s['per_class'])} classes" if len(counts) == 1
           else f"{len(s['per_class'])} classes, {min(counts)}-{max(counts)} each")
    lines = [f"\nsplit {s['name']}  [{s['role']}, {s['kind']}]  mass {s['mass']:.4f} of the space  "
             f"{s['images']} images ({per})  instances: {s['instances']}"]
    for n, a in s["axes"].items():
        ivs = "  ".join(_fmt(iv) for iv in a["intervals"])
        lines.append(f"  {n:<13} {ivs} {a['unit']}".rstrip())
    if not s["is_product"]:
        lines += _box_lines(d, s["boxes"])
    if s["kind"] not in ("train", "random") and s.get("evidence", {}).get("unseen"):
        unseen = "; ".join(f"class {', '.join(ivs)}" if n == CLASS else f"{n} {' '.join(_fmt(iv) for iv in ivs)}"
                           for n, ivs in s["evidence"]["unseen"].items())
        lines.append(f"  never seen in training: {unseen}")
    if len(s["per_class"]) < len(d["classes"]):
        lines.append(f"  classes: {', '.join(s['per_class'])}")
    return lines


def _box_lines(d: dict, boxes: list) -> list[str]:
    """A region that is not a product of its intervals: its first MAX_BOXES boxes, each naming
    only the axes it restricts."""
    lines = [f"  not a product of the above: {len(boxes)} boxes, e.g."]
    for b in boxes[:MAX_BOXES]:
        parts = [f"{n} {_fmt(iv)}" for n, iv in b.items() if n != "classes" and iv != d["axes"][n]["range"]
                 and not (isinstance(iv, dict) and len(iv["levels"]) == len(d["axes"][n].get("levels", iv["levels"])))]
        cl = b["classes"]
        who = f"  [{', '.join(cl)}]" if len(cl) < len(d["classes"]) else ""
        lines.append(f"    {', '.join(parts) or 'everything'}{who}")
    if len(boxes) > MAX_BOXES:
        lines.append(f"    ... {len(boxes) - MAX_BOXES} more (see --json)")
    return lines


def _fmt(iv) -> str:
    if isinstance(iv, dict):
        return "{" + ", ".join(f"{v:g}" for v in iv["levels"]) + "}"
    return f"[{iv[0]:g}, {iv[1]:g}]"
