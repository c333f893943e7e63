"""From a spec file to the objects the rest of the pipeline works with.

`open_spec(path)` loads and validates the spec, builds its object source and background
(relative paths resolve against the spec's folder) and makes the plan, handing the planner
the renderer's footprint so a refused guarantee comes with a concrete witness.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .errors import SpecError
from .plan import Plan, make_plan
from .plan.regions import OTHER_CLASS, named_classes
from .render import RenderParams, footprint
from .sources import backgrounds as bg
from .sources.folder import SpriteFolder
from .sources.glyphs import Glyphs
from .sources.polyomino import Polyominoes
from .spec import Spec, parse_spec, read_spec_file


@dataclass(frozen=True)
class Built:
    spec: Spec
    base_dir: Path
    source: object
    background: object
    plan: Plan

    @property
    def input_folders(self) -> dict[str, Path]:
        """The folders the spec reads images from, by the spec key naming them: its sprite
        folder ("objects") and its background folder ("background")."""
        found = {"objects": getattr(self.source, "path", None), "background": getattr(self.background, "path", None)}
        return {key: Path(p) for key, p in found.items() if p is not None}

    def input_digests(self) -> dict[str, str]:
        """A SHA-256 of the files each input folder's source read (see `files_digest`):
        spec.json records them, so a resume or verify can tell when those files changed,
        which the spec hash (of the spec's text) cannot."""
        sources = {"objects": self.source, "background": self.background}
        return {key: files_digest(root, sources[key].read_files()) for key, root in self.input_folders.items()}


def files_digest(root: Path, files) -> str:
    """SHA-256 over some files below `root`, in the given order: each one's path relative to
    `root` and its bytes' SHA-256 (only files a source has read: regular files it accepted)."""
    import hashlib
    import os

    outer = hashlib.sha256()
    for path in files:
        inner = hashlib.sha256()
        with open(path, "rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                inner.update(block)
        outer.update(os.path.relpath(path, root).encode("utf-8", "surrogateescape") + b"\0")
        outer.update(inner.digest())
    return outer.hexdigest()


def _colour(c):
    return (int(c * 255),) * 3 if isinstance(c, float) else tuple(int(v) for v in c)


def object_source(spec: Spec, base_dir: Path):
    o = spec.objects
    if o.kind == "polyomino":
        return Polyominoes(cells=o.cells, cell_px=o.cell_px, one_sided=o.one_sided, colour=_colour(o.colour), gap_px=o.gap_px)
    if o.kind == "glyphs":
        fonts = {"fonts": o.fonts} if o.fonts is not None else {}
        return Glyphs(texts=o.texts, height_px=o.height_px, thickness=o.thickness, colour=_colour(o.colour), **fonts)
    return SpriteFolder(_resolve(o.path, base_dir), key_colour=o.key_colour, mask_suffix=o.mask_suffix)


def background(spec: Spec, base_dir: Path):
    b = spec.background
    if b.kind == "solid":
        return bg.Solid(b.value)
    if b.kind == "uniform_noise":
        return bg.UniformNoise(b.lo, b.hi, b.per_channel)
    if b.kind == "gaussian_noise":
        return bg.GaussianNoise(b.mean, b.sd, b.per_channel)
    if b.kind == "pink_noise":
        return bg.PinkNoise(b.mean, b.contrast, b.exponent, b.per_channel, b.synthesis)
    return bg.ImageFolder(_resolve(b.path, base_dir))


def _resolve(path: str, base_dir: Path) -> Path:
    p = Path(path).expanduser()
    return p if p.is_absolute() else base_dir / p


def footprint_at(sprite, cx, cy, scale, angle, mirror, hw, alpha_threshold: float = 0.5):
    return footprint(sprite, RenderParams(float(cx), float(cy), float(scale), float(angle), bool(mirror)), hw, alpha_threshold)


def build(spec: Spec, base_dir: Path, strict: bool = True, for_data: bool = False) -> Built:
    """`for_data`: the spec splits existing data, so it may leave out `objects:`; its classes are
    those its regions name, plus OTHER_CLASS for every other label (source is then None)."""
    if spec.objects is None:
        if not for_data:
            raise SpecError("required key is missing", where="objects",
                            hint="only a spec that splits existing data (augsplit assign, audit) may leave it out")
        names = [n for s in spec.splits.values() for n in named_classes(s.region) + list(s.classes or [])]
        plan = make_plan(spec, None, None, strict, classes=tuple(dict.fromkeys(names)) + (OTHER_CLASS,))
        return Built(spec, base_dir, None, background(spec, base_dir), plan)
    source = object_source(spec, base_dir)
    thr = spec.render.alpha_threshold
    plan = make_plan(spec, source, lambda s, cx, cy, sc, a, m, hw: footprint_at(s, cx, cy, sc, a, m, hw, thr), strict)
    return Built(spec, base_dir, source, background(spec, base_dir), plan)


def open_spec(path: str | Path, for_data: bool = False) -> Built:
    """Load, validate and plan a spec file; a SpecError names the file and line of its key path.
    `for_data`: the spec only splits existing data (it may leave out `objects:`)."""
    f = read_spec_file(path)
    with f.located():
        return build(parse_spec(f.data, source=str(f.path)), f.path.resolve().parent, for_data=for_data)


def open_mapping(data: dict, base_dir: str | Path = ".", strict: bool = True) -> Built:
    """As open_spec, for a spec already in memory (tests, notebooks)."""
    return build(parse_spec(data), Path(base_dir), strict)
