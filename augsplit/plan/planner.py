"""The planner: a validated spec + an object source -> concrete splits and proven guarantees.

`make_plan` evaluates every split's region, restricts it to the split's classes, fixes the
per-class counts and instances, labels each test split's holdout kind, and proves each
guarantee (or refuses the spec with the numbers, or — with auto_guard — shrinks the second
split's region until the proof goes through). Nothing here renders or reads files: the
object source and the footprint renderer are passed in.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from ..errors import GuaranteeError, SourceError, SpecError
from ..limits import MAX_IMAGES, MAX_SCALED_SPRITE_PIXELS, MAX_SPLIT_IMAGES
from ..space.axes import Space
from ..space.region import Region
from ..space.sample import StackedRegions
from ..spec import Spec, spec_hash
from ..units import Canvas, Viewing
from .geometry import support_radius
from .guarantees import Verdict, check_parameters, dilate_parameters, footprint_gaps, tightest
from .guard import footprint_guard
from .kinds import holdout_kind, projection, values_text
from .regions import CLASS, build_region, build_space
from .settings import RenderSettings, Settings, settings_of


@dataclass(frozen=True)
class SplitPlan:
    """One split, fully decided: its region, role, holdout kind, counts and instances."""

    name: str
    index: int
    role: str  # "train" | "test"
    kind: str  # "train" | "random" | "interpolation" | "extrapolation" | "composition"
    region: Region
    counts: tuple[int, ...]  # images per class index (0 where the class is not in the split)
    instances: str  # "seen" | "unseen" | "all"
    evidence: dict = field(default_factory=dict, compare=False)
    stratify: bool = False  # images spread evenly over the region's cells instead of by mass

    def __post_init__(self):
        parts = tuple(self.region.restrict(CLASS, c - 0.5, c + 0.5) for c in range(len(self.counts)))
        object.__setattr__(self, "_class_regions", parts)

    @property
    def total(self) -> int:
        return int(sum(self.counts))

    def class_region(self, c: int) -> Region:
        """The split's region for one class (what images of that class are drawn from)."""
        return self._class_regions[c]

    def class_stack(self) -> StackedRegions:
        """The class regions stacked for sampling rows of several classes at once, made once."""
        stack = self.__dict__.get("_class_stack")
        if stack is None:
            stack = StackedRegions(self._class_regions)
            object.__setattr__(self, "_class_stack", stack)
        return stack

    def __repr__(self) -> str:
        how = self.region.how if len(self.region.how) <= 120 else self.region.how[:117] + "..."
        return (f"SplitPlan({self.name!r}, role={self.role}, kind={self.kind}, images={self.total}, "
                + (f"region={how}, " if how else "") + f"mass={self.region.mass():.4g}, boxes={self.region.nbox})")


@dataclass(frozen=True)
class Plan:
    spec: Spec
    hash: str
    canvas: Canvas
    space: Space
    classes: tuple[str, ...]
    instances: tuple[tuple[int, ...], ...]  # per class: the seen instance ids
    unseen: tuple[tuple[int, ...], ...]  # per class: the unseen instance ids
    splits: tuple[SplitPlan, ...]
    verdicts: tuple[Verdict, ...]
    radii: np.ndarray = field(compare=False)  # native support radius (px) per class, over all instances
    guard: Region | None = field(default=None, compare=False)  # what auto_guard removed
    warnings: tuple = field(default=(), compare=False)  # PlanWarning: what the spec cannot do (plan/warnings.py)
    settings: Settings | None = field(default=None, compare=False)  # the spec's settings as plain values

    @property
    def seed(self) -> int:
        return self.settings.seed

    @property
    def render(self) -> RenderSettings:
        return self.settings.render

    def split(self, name: str) -> SplitPlan:
        for s in self.splits:
            if s.name == name:
                return s
        raise SpecError(f"unknown split '{name}'; the spec has {', '.join(s.name for s in self.splits)}")

    def instance_ids(self, split: SplitPlan, c: int) -> tuple[int, ...]:
        if split.instances == "seen":
            return self.instances[c]
        if split.instances == "unseen":
            return self.unseen[c]
        return tuple(sorted(self.instances[c] + self.unseen[c]))

    def instance_table(self, split: SplitPlan) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(start, count, ids): class c's allowed instance ids in `split` are
        ids[start[c]:start[c] + count[c]], in `instance_ids` order; made once per split."""
        tables = self.__dict__.setdefault("_instance_tables", {})
        table = tables.get(split.name)
        if table is None:
            per = [self.instance_ids(split, c) for c in range(len(self.classes))]
            count = np.array([len(i) for i in per], dtype=np.int64)
            start = np.concatenate([[0], np.cumsum(count)[:-1]]).astype(np.int64)
            table = tables[split.name] = (start, count, np.array([i for ids in per for i in ids], dtype=np.int32))
        return table

    def __repr__(self) -> str:
        from ..reprs import plan_repr

        return plan_repr(self)

    def _repr_html_(self) -> str:
        from ..reprs import plan_html

        return plan_html(self)


def canvas_of(spec: Spec) -> Canvas:
    v = Viewing(spec.viewing.distance_cm, spec.viewing.px_per_cm) if spec.viewing else None
    return Canvas(spec.canvas.width, spec.canvas.height, v)


def make_plan(spec: Spec, source, footprint_at=None, strict: bool = True, classes=None) -> Plan:
    """Plan every split and prove every guarantee. `source` is an ObjectSource; `footprint_at`
    (the renderer's footprint function) is used only to find witnesses for refusals. With
    strict=False a refused guarantee is kept in `plan.verdicts` instead of raising.

    `source=None` plans a spec without objects, which only splits existing data: `classes`
    names the class levels, and footprint guarantees are declared (audited on the data's own
    boxes), not proved."""
    return _Planner(spec, source, footprint_at, strict, classes).plan()


class _Planner:
    """The state one `make_plan` call shares between its steps: the space, the classes and
    their instances, the split regions, and the guarantees' verdicts."""

    def __init__(self, spec: Spec, source, footprint_at, strict: bool, classes):
        self.spec, self.source, self.footprint_at, self.strict = spec, source, footprint_at, strict
        self.canvas = canvas_of(spec)
        self.classes = tuple(source.classes if source is not None else classes or ())
        if not self.classes:
            raise SpecError("the object source has no classes", where="objects")
        self.space = build_space(spec, self.canvas, self.classes)
        self.thr = spec.render.alpha_threshold
        self.seen, self.unseen, self.radii_all = self._objects()
        self._check_split_instances()

    # ---- build space and classes -------------------------------------------------------

    def _objects(self):
        """Per class the seen and unseen instance ids, and the largest support radius."""
        spec, source, classes = self.spec, self.source, self.classes
        if source is None:
            return [[0] for _ in classes], [[] for _ in classes], np.zeros(len(classes))
        seen, unseen = _instances(spec, source, classes)
        _check_fits(source, seen, unseen, self.space, self.canvas)
        radii = np.array([max(support_radius(source.sprite(c, i).rgba, source.sprite(c, i).anchor, self.thr)
                              for i in seen[c] + unseen[c]) for c in range(len(classes))])
        return seen, unseen, radii

    def _check_split_instances(self) -> None:
        """Before any proof: the proofs need the split's instances."""
        for name, sp in self.spec.splits.items():
            if sp.instances == "unseen" and not any(self.unseen):
                raise SpecError("no instances are held out (set objects.unseen_instances)",
                                where=f"splits.{name}.instances")

    # ---- regions per split -------------------------------------------------------------

    def resolve(self, fixed: dict[str, Region]) -> dict[str, Region]:
        """Every split's region; `fixed` ones (already guarded) are taken as they are, so a
        split defined by reference to a guarded split sees its guarded region."""
        return _Resolver(self, fixed).all()

    def region_of(self, name: str, split_region) -> Region:
        region = _split_region(self.spec, name, self.space, self.classes, split_region)
        if self.spec.render.keep_inside:
            region = _keep_inside(self.space, self.canvas, region, self.radii_all, self.classes, name)
        return region

    # ---- proofs ------------------------------------------------------------------------

    def prove(self, g, regions):
        a, b = g.between
        if self.source is None and g.disjoint == "footprint":
            return _declared_footprint(g), None, None
        spec = self.spec
        ra = _radii(self.source, self.seen, self.unseen, spec.splits[a].instances, spec, self.classes)
        rb = _radii(self.source, self.seen, self.unseen, spec.splits[b].instances, spec, self.classes)
        ids = (_instance_ids(self.seen, self.unseen, spec.splits[a].instances, spec),
               _instance_ids(self.seen, self.unseen, spec.splits[b].instances, spec))
        return _prove(g, self.space, self.canvas, regions[a], regions[b], ra, rb, self.source, self.seen,
                      self.unseen, self.footprint_at, self.classes, self.thr, ids), ra, rb

    # ---- guards ------------------------------------------------------------------------

    def guarantees(self, regions: dict[str, Region]):
        """Prove every guarantee; auto_guard may shrink the second split's region (in place).
        Returns the verdicts, the guarded regions and what the guards took away."""
        verdicts = []
        guarded: dict[str, Region] = {}
        guard_total = Region.empty(self.space)
        for gi, g in enumerate(self.spec.guarantees):
            v, ra, rb = self.prove(g, regions)
            if not v.ok and g.auto_guard:
                v, taken = self._auto_guard(g, regions, ra, rb, where=f"guarantees.{gi}")
                guarded[g.between[1]] = regions[g.between[1]]
                guard_total = guard_total | taken
            if not v.ok and self.strict:
                raise GuaranteeError(v.message, where=f"guarantees.{gi}",
                                     hint="move the regions apart, lower the largest scale, or set auto_guard: true")
            verdicts.append(v)
        return verdicts, guarded, guard_total

    def _auto_guard(self, g, regions, ra, rb, where: str):
        """Shrink the second split's region until the guarantee holds; the "guarded" verdict
        and what was taken away."""
        a, b = g.between
        guard, guard_px = _guard_region(g, self.space, self.canvas, regions, ra, rb,
                                        lambda r: self.prove(g, {**regions, b: r})[0].ok)
        before = regions[b].mass()
        taken = regions[b] & guard  # what the guard takes away from b
        regions[b] = regions[b] - guard
        v2, _, _ = self.prove(g, regions)
        if not v2.ok:
            raise GuaranteeError(f"auto_guard could not make the guarantee hold: {v2.message}", where=where)
        removed = 1.0 - (regions[b].mass() / before if before > 0 else 0.0)
        nums = dict(v2.numbers, removed_fraction=removed)
        band = ""
        if guard_px is not None:
            nums["guard_px"] = guard_px
            band = f" (positions within {guard_px:.4g} px of {a}'s, the least band the proof accepts)"
        v = Verdict(g.disjoint, g.between, "guarded", g.per_class, nums,
                    f"auto_guard removed {removed:.1%} of {b}'s region{band}; then {v2.message}")
        if regions[b].is_empty():
            raise GuaranteeError(f"auto_guard removed all of {b}'s region", where=where)
        return v, taken

    def reprove(self, regions, guarded, verdicts) -> dict[str, Region]:
        """Splits defined by reference to a guarded split follow it; every guarantee is proved
        again on the final regions (a reference through `minus` can grow a region)."""
        final = self.resolve(guarded)
        changed = {n for n in self.spec.splits
                   if n not in guarded and (final[n] - regions[n]).mass() + (regions[n] - final[n]).mass() > 1e-12}
        for gi, g in enumerate(self.spec.guarantees):
            if not changed & set(g.between):
                continue
            v, _, _ = self.prove(g, final)
            if not v.ok and self.strict:
                raise GuaranteeError(f"after auto_guard, {v.message}", where=f"guarantees.{gi}",
                                     hint="splits defined by reference to a guarded split changed with it")
            if verdicts[gi].status != "guarded":
                verdicts[gi] = v
        return final

    # ---- kinds and counts --------------------------------------------------------------

    def split_plans(self, regions) -> list[SplitPlan]:
        spec, space, classes = self.spec, self.space, self.classes
        train_union = Region.empty(space)
        for n in spec.splits:
            if _role(n, spec.splits[n]) == "train":
                train_union = train_union | regions[n]
        splits = []
        for index, (name, s) in enumerate(spec.splits.items()):
            role = _role(name, s)
            region = regions[name]
            if region.is_empty():
                raise SpecError("the region is empty", where=f"splits.{name}.region")
            counts = _counts(s, region, space, classes, name)
            if role == "train":
                kind, evidence = "train", {}
            else:
                kind, evidence = holdout_kind(space, region, train_union)
                _check_declared_kind(s.kind, kind, evidence, space, classes, train_union, name)
            instances = s.instances or ("seen" if any(self.unseen) else "all")
            splits.append(SplitPlan(name, index, role, kind, region, counts, instances, evidence, s.stratify))
        total = sum(s.total for s in splits)
        if total > MAX_IMAGES:
            raise SpecError(f"{total:,} images in all are above the limit of {MAX_IMAGES:,} "
                            "(limits.MAX_IMAGES)", where="splits")
        return splits

    def plan(self) -> Plan:
        spec = self.spec
        regions = self.resolve({})
        verdicts, guarded, guard_total = self.guarantees(regions)
        if guarded:
            regions = self.reprove(regions, guarded, verdicts)
        splits = self.split_plans(regions)
        plan = Plan(spec, spec_hash(spec), self.canvas, self.space, self.classes, tuple(map(tuple, self.seen)),
                    tuple(map(tuple, self.unseen)), tuple(splits), tuple(verdicts), self.radii_all,
                    guard_total if guard_total.nbox else None, settings=settings_of(spec))
        from .warnings import plan_warnings

        return replace(plan, warnings=plan_warnings(plan, self.source))


class _Resolver:
    """Evaluates split regions that may refer to one another, refusing unknown names and cycles."""

    def __init__(self, planner: _Planner, fixed: dict[str, Region]):
        self.planner = planner
        self.regions = dict(fixed)
        self.visiting: list[str] = []

    def all(self) -> dict[str, Region]:
        for name in self.planner.spec.splits:
            self.split_region(name, f"splits.{name}")
        return self.regions

    def split_region(self, name: str, where: str) -> Region:
        if name not in self.planner.spec.splits:
            raise SpecError(f"unknown split '{name}'", where=where)
        if name in self.visiting:
            raise SpecError(f"splits refer to each other in a cycle: {' -> '.join(self.visiting + [name])}", where=where)
        if name not in self.regions:
            self.visiting.append(name)
            self.regions[name] = self.planner.region_of(name, self.split_region)
            self.visiting.pop()
        return self.regions[name]


def _declared_footprint(g) -> Verdict:
    """A footprint guarantee of a spec without objects: declared, audited later on the data."""
    if g.auto_guard:
        raise SpecError("auto_guard of a footprint guarantee needs objects (their size sets the band)",
                        where="guarantees")
    return Verdict("footprint", g.between, "declared", g.per_class, {},
                   "declared, not proved: the spec has no objects; `augsplit audit` checks it on the "
                   "data's boxes or masks")


# ---- pieces ----------------------------------------------------------------------------


def _role(name: str, s) -> str:
    return s.role or ("train" if name.startswith("train") else "test")


def _split_region(spec: Spec, name: str, space: Space, classes, split_region) -> Region:
    s = spec.splits[name]
    where = f"splits.{name}.region"
    region = build_region(s.region, space, classes, where, split_region)
    if s.classes is not None:
        region = region & build_region({"class": s.classes}, space, classes, f"splits.{name}.classes")
    return region


def _instances(spec: Spec, source, classes):
    k = spec.objects.unseen_instances
    seen, unseen = [], []
    for c, name in enumerate(classes):
        n = source.n_instances(c)
        if k and n <= k:
            raise SpecError(f"class '{name}' has {n} instance(s); holding out {k} leaves none to train on",
                            where="objects.unseen_instances")
        seen.append(list(range(n - k)))
        unseen.append(list(range(n - k, n)))
    return seen, unseen


def _check_fits(source, seen, unseen, space, canvas) -> None:
    """Refuse a sprite whose opaque part is larger than the canvas even at the smallest scale,
    or whose warp box (the renderer's allocation) at the largest scale is above the limit."""
    smin = float(space["scale"].from_t(space.t_lo[space.index["scale"]])) if "scale" in space else 1.0
    smax = float(space["scale"].from_t(space.t_hi[space.index["scale"]])) if "scale" in space else 1.0
    for c in range(len(seen)):
        for i in seen[c] + unseen[c]:
            sp = source.sprite(c, i)
            side = math.hypot(sp.width + 1, sp.height + 1) * smax + 2  # any angle; as render._warp_box
            if side * side > MAX_SCALED_SPRITE_PIXELS:
                files = getattr(source, "files", None)
                where = "axes.scale" if not files else str(files[c][i])
                raise SpecError(f"at the largest scale {smax:g} the {sp.width}x{sp.height} px sprite of class "
                                f"{source.classes[c]} needs a {side:.4g} x {side:.4g} px patch, above the limit of "
                                f"{MAX_SCALED_SPRITE_PIXELS:,} px (limits.MAX_SCALED_SPRITE_PIXELS)", where=where)
            rows, cols = np.nonzero(sp.rgba[..., 3] > 0)
            h, w = (rows.max() - rows.min() + 1) * smin, (cols.max() - cols.min() + 1) * smin
            if h > canvas.height or w > canvas.width:
                files = getattr(source, "files", None)
                where = str(files[c][i]) if files else f"objects (class {source.classes[c]}, instance {i})"
                raise SourceError(f"the sprite is {w:.0f}x{h:.0f} px at the smallest scale {smin:g}, larger than the "
                                  f"{canvas.width}x{canvas.height} canvas", where=where)


def _radii(source, seen, unseen, instances, spec, classes) -> np.ndarray:
    if source is None:
        return np.zeros(len(classes))
    mode = instances or ("seen" if spec.objects.unseen_instances else "all")
    out = []
    for c in range(len(classes)):
        ids = seen[c] if mode == "seen" else unseen[c] if mode == "unseen" else seen[c] + unseen[c]
        thr = spec.render.alpha_threshold
        out.append(max(support_radius(source.sprite(c, i).rgba, source.sprite(c, i).anchor, thr) for i in ids))
    return np.array(out)


def _instance_ids(seen, unseen, instances, spec) -> list[list[int]]:
    """Per class, the instance ids a split may draw (as `_radii` decides)."""
    mode = instances or ("seen" if spec.objects is not None and spec.objects.unseen_instances else "all")
    return [list(s) if mode == "seen" else list(u) if mode == "unseen" else list(s) + list(u)
            for s, u in zip(seen, unseen)]


def _prove(g, space, canvas, A, B, ra, rb, source, seen, unseen, footprint_at, classes,
           alpha_threshold: float = 0.5, ids=None) -> Verdict:
    if g.disjoint == "parameters":
        return check_parameters(space, A, B, g.margin, g.per_class, g.between)
    # footprints: (1) the disc bound; on refusal (1b) a quick witness at the closest points,
    # then (2, 3) rasterised envelopes and an exact per-pixel search (envelope.py)
    gaps = footprint_gaps(space, canvas, A, B, ra, rb, g.per_class)
    t = tightest(gaps)
    if t is None:
        return Verdict("footprint", g.between, "proved", g.per_class, {"gap_px": math.inf}, "no class appears in both splits")
    nums, bound = _disc_bound(g, canvas, t, classes)
    if t.slack_px > 0:
        nums["stage"] = "disc"
        return Verdict("footprint", g.between, "proved", g.per_class, nums, bound)
    from .witness import find_witness

    ids_a, ids_b = ids if ids is not None else ([s + u for s, u in zip(seen, unseen)],) * 2
    witness = None
    if footprint_at is not None:
        sa = [source.sprite(t.class_a, i) for i in ids_a[t.class_a]]
        sb = [source.sprite(t.class_b, i) for i in ids_b[t.class_b]]
        witness = find_witness(space, canvas, A, B, t, sa, sb, footprint_at)
    if witness is None:
        env = _envelopes(g, space, canvas, A, B, source, footprint_at, classes, alpha_threshold, ids_a, ids_b)
        nums["envelope"] = {"candidates": env.candidates, "excluded": env.excluded, "undecided": env.undecided,
                            "boxes": env.boxes}
        if env.disjoint:
            nums["stage"] = "envelope"
            how = ("they share no pixel" if env.candidates == 0 else
                   f"the {env.candidates} pixel(s) they share were each excluded by an exact search")
            return Verdict("footprint", g.between, "proved", g.per_class, nums,
                           f"no pixel is coverable by both (by rasterised envelopes: {how}); the disc bound alone "
                           f"does not suffice: {bound}")
        witness = env.accepted
    return _refusal(g, nums, bound, witness)


def _disc_bound(g, canvas, t, classes) -> tuple[dict, str]:
    """The numbers of the tightest class pair's disc bound, and the sentence stating it."""
    nums = {"gap_px": t.gap_px, "need_px": t.need_px, "slack_px": t.slack_px,
            "class_a": classes[t.class_a], "class_b": classes[t.class_b]}
    if canvas.viewing is not None:
        nums["gap_deg"] = float(canvas.viewing.offset_to_deg(t.gap_px))
        nums["need_deg"] = float(canvas.viewing.offset_to_deg(t.need_px))
    a, b = g.between
    deg = (f" ({nums['gap_deg']:.3g} deg)" if "gap_deg" in nums else "")
    bound = (f"position gap {t.gap_px:.2f} px{deg} {'>' if t.slack_px > 0 else '<'} {t.need_px:.2f} px needed "
             f"(class {classes[t.class_a]} in {a}, {classes[t.class_b]} in {b} at their largest scales)")
    return nums, bound


def _envelopes(g, space, canvas, A, B, source, footprint_at, classes, alpha_threshold, ids_a, ids_b):
    """Stages 2 and 3: rasterised envelopes of both regions and the exact per-pixel search."""
    from .envelope import check_envelopes, region_items
    from .witness import pair_witness

    items_a = region_items(space, canvas, A, {c: [source.sprite(c, i) for i in ids_a[c]] for c in range(len(classes))})
    items_b = region_items(space, canvas, B, {c: [source.sprite(c, i) for i in ids_b[c]] for c in range(len(classes))})
    check = pair_witness(space, canvas, A, B, items_a, items_b, footprint_at) if footprint_at is not None else None
    return check_envelopes(items_a, items_b, canvas, alpha_threshold, g.per_class, check)


def _refusal(g, nums: dict, bound: str, witness) -> Verdict:
    """The refused verdict: an overlap with its witness, or unproven when none was found."""
    a, b = g.between
    nums["witness"] = witness
    status = "overlap" if witness else "unproven"
    nums["status"] = status
    if witness:
        what = (f"e.g. {witness['a']['class']} in {a} at ({witness['a']['cx_px']:.1f}, {witness['a']['cy_px']:.1f}) px and "
                f"{witness['b']['class']} in {b} at ({witness['b']['cx_px']:.1f}, {witness['b']['cy_px']:.1f}) px share "
                f"{witness['shared_px']} pixel(s)")
    else:
        e = nums.get("envelope", {})
        what = (f"no shared pixel was found, but disjointness cannot be proved ({e.get('undecided', 0)} of "
                f"{e.get('candidates', 0)} pixel(s) the rasterised envelopes share stay undecided)")
    return Verdict("footprint", g.between, "refused", g.per_class, nums,
                   f"footprints of {a} and {b} can meet: {bound}; {what}")


def _guard_region(g, space, canvas, regions, ra, rb, proves) -> tuple[Region, float | None]:
    """What auto_guard takes out of the second split, and (footprints) the band's width in px."""
    A, B = regions[g.between[0]], regions[g.between[1]]
    if g.disjoint == "parameters":
        return dilate_parameters(space, A, max(g.margin, 1e-9) * (1 + 1e-9), g.per_class), None
    # the disc bound's largest need is a width the proof surely accepts; the search narrows it
    start = max((gp.need_px for gp in footprint_gaps(space, canvas, A, B, ra, rb, g.per_class)), default=0.0)
    return footprint_guard(proves, canvas, A, B, start, g.per_class)


def _keep_inside(space, canvas, region, radii, classes, name) -> Region:
    """Shrink each class's positions so its whole support stays on the canvas at every scale."""
    out = Region.empty(space)
    for c in range(len(classes)):
        part = region.restrict(CLASS, c - 0.5, c + 0.5)
        if part.is_empty():
            continue
        kept = Region.empty(space)
        for k in range(part.nbox):
            box = Region(space, part.lo[k:k + 1], part.hi[k:k + 1])
            from .geometry import box_max_scale

            r = radii[c] * box_max_scale(space, part.hi[k])
            inner = _inner_positions(space, canvas, r)
            kept = kept | (box & inner)
        if kept.is_empty():
            raise SpecError(f"keep_inside leaves no legal position for class '{classes[c]}' "
                            f"(radius {radii[c]:.1f} px at native size)", where=f"splits.{name}.region")
        out = out | kept
    return out


def _inner_positions(space, canvas, r: float) -> Region:
    """Anchor positions at least r px from every canvas edge (inscribed disc for polar axes)."""
    ivs = {}
    if "eccentricity" in space:
        ax = space["eccentricity"]
        rmax = min(canvas.width, canvas.height) / 2.0 - r
        if rmax < 0:
            return Region.empty(space)
        v = min(float(canvas.radius_from_px(ax.unit, rmax)), ax.hi)
        if v <= ax.lo:
            return Region.empty(space)
        ivs["eccentricity"] = [(float(ax.to_t(ax.lo)), float(ax.to_t(v)))]
    else:
        for name, ext in (("x", canvas.width), ("y", canvas.height)):
            if name not in space:
                if ext / 2.0 < r:
                    return Region.empty(space)
                continue
            ax = space[name]
            a = max(float(canvas.from_px(name, ax.unit, r)), ax.lo)
            b = min(float(canvas.from_px(name, ax.unit, ext - r)), ax.hi)
            if b <= a:
                return Region.empty(space)
            try:
                ivs[name] = ax.interval_to_t(a, b)
            except ValueError:
                return Region.empty(space)
    return Region.box(space, ivs)


def _counts(s, region: Region, space: Space, classes, name: str) -> tuple[int, ...]:
    present = [c for c in range(len(classes)) if not region.restrict(CLASS, c - 0.5, c + 0.5).is_empty()]
    if not present:
        raise SpecError("no class has any room in this region", where=f"splits.{name}.region")
    counts = [0] * len(classes)
    if s.per_class is not None:
        for c in present:
            counts[c] = s.per_class
    else:
        q, r = divmod(s.count, len(present))
        for k, c in enumerate(present):
            counts[c] = q + (1 if k < r else 0)
    if sum(counts) > MAX_SPLIT_IMAGES:
        raise SpecError(f"{sum(counts):,} images ({s.per_class} per class x {len(present)} classes) are above the "
                        f"limit of {MAX_SPLIT_IMAGES:,} per split (limits.MAX_SPLIT_IMAGES)", where=f"splits.{name}")
    return tuple(counts)


def _check_declared_kind(declared, kind, evidence, space, classes, train, name) -> None:
    if declared is None or declared == kind:
        return
    where = f"splits.{name}.kind"
    unseen = evidence.get("unseen", {})
    never = "; ".join(values_text(space, n, ivs, classes) for n, ivs in unseen.items())
    if declared == "composition" and unseen:
        seen = "; ".join(values_text(space, n, projection(train, space.index[n]), classes) for n in unseen)
        raise SpecError(f"composition claims every marginal value is seen in training, but {never} never is "
                        f"(training has {seen}); the regions make it {kind}", where=where)
    shared = evidence.get("shared_mass_fraction")
    why = (f"never seen in training: {never}" if never else
           f"{shared:.1%} of its mass lies in the training region" if shared is not None else "")
    raise SpecError(f"declared {declared}, but the regions make it {kind}" + (f" ({why})" if why else ""), where=where)
