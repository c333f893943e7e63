"""YAML -> validated, immutable spec. Pydantic lives here and nowhere else.

`load_spec(path)` reads YAML safely, validates every key (unknown keys are errors with a
did-you-mean hint), fills defaults and returns a frozen `Spec`. `canonical(spec)` is the
JSON of that spec with every default filled in, and `spec_hash(spec)` its SHA-256: it changes
whenever anything that decides an image changes, the order of splits and axes included.
Regions stay as parsed YAML here; `plan/` turns them into sets.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from . import limits as L
from .errors import SpecError
from .names import check_distinct_casefold, check_name, shown
from .space.axes import BUILTIN

PosInt = Annotated[int, Field(gt=0, strict=True)]
ImageCount = Annotated[int, Field(gt=0, le=L.MAX_SPLIT_IMAGES, strict=True)]
NonNegInt = Annotated[int, Field(ge=0, strict=True)]
PosFloat = Annotated[float, Field(gt=0)]
Colour = Union[Annotated[float, Field(ge=0, le=1)], tuple[int, int, int]]  # a grey level in [0, 1] or RGB


def _hint(word: str, choices) -> str | None:
    close = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=0.6)
    return f"did you mean '{close[0]}'?" if close else None


class Model(BaseModel):
    """Frozen, strict about unknown keys, and helpful about misspelt ones."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    @model_validator(mode="before")
    @classmethod
    def _unknown_keys(cls, data: Any):
        if isinstance(data, dict):
            allowed = set(cls.model_fields) | {f.alias for f in cls.model_fields.values() if f.alias}
            for key in data:
                if key not in allowed:
                    hint = _hint(key, allowed)
                    raise ValueError(f"unknown key '{key}'" + (f" ({hint})" if hint else "")
                                     + f"; allowed: {', '.join(sorted(allowed))}")
        return data


CanvasSide = Annotated[int, Field(gt=0, le=L.MAX_CANVAS_SIDE, strict=True)]


class CanvasSpec(Model):
    width: CanvasSide
    height: CanvasSide
    mode: Literal["rgb", "gray"] = "rgb"

    @model_validator(mode="after")
    def _pixels(self):
        if self.width * self.height > L.MAX_CANVAS_PIXELS:
            raise SpecError(f"{self.width} x {self.height} = {self.width * self.height:,} px is above the limit of "
                            f"{L.MAX_CANVAS_PIXELS:,} px per image (limits.MAX_CANVAS_PIXELS)", where="canvas")
        return self


class ViewingSpec(Model):
    distance_cm: PosFloat
    px_per_cm: PosFloat


class PolyominoSpec(Model):
    kind: Literal["polyomino"]
    cells: Annotated[int, Field(ge=1, le=10, strict=True)]
    cell_px: PosInt
    one_sided: bool = False
    colour: Colour = (255, 255, 255)
    gap_px: NonNegInt = 0
    unseen_instances: NonNegInt = 0


class GlyphSpec(Model):
    kind: Literal["glyphs"]
    texts: list[str] = Field(min_length=1)
    fonts: list[Literal["simplex", "plain", "duplex", "complex", "triplex", "complex_small", "script_simplex", "script_complex"]] | None = None
    height_px: PosInt = 20
    thickness: PosInt = 2
    colour: Colour = (255, 255, 255)
    unseen_instances: NonNegInt = 0


class FolderSpec(Model):
    kind: Literal["folder"]
    path: str
    key_colour: tuple[int, int, int] | None = None
    mask_suffix: str = "_mask"
    unseen_instances: NonNegInt = 0

    @field_validator("mask_suffix")
    @classmethod
    def _suffix(cls, v):  # part of file names (and of a glob pattern): the name rule keeps it literal
        return check_name(v, "objects.mask_suffix")


ObjectsSpec = Annotated[Union[PolyominoSpec, GlyphSpec, FolderSpec], Field(discriminator="kind")]


class SolidBg(Model):
    kind: Literal["solid"]
    value: Colour = 0.0


class UniformNoiseBg(Model):
    kind: Literal["uniform_noise"]
    lo: Annotated[float, Field(ge=0, le=1)] = 0.0
    hi: Annotated[float, Field(ge=0, le=1)] = 1.0
    per_channel: bool = False


class GaussianNoiseBg(Model):
    kind: Literal["gaussian_noise"]
    mean: Annotated[float, Field(ge=0, le=1)] = 0.5
    sd: Annotated[float, Field(ge=0)] = 0.1
    per_channel: bool = False


class PinkNoiseBg(Model):
    kind: Literal["pink_noise"]
    mean: Annotated[float, Field(ge=0, le=1)] = 0.5
    contrast: Annotated[float, Field(ge=0)] = 0.15
    exponent: float = 1.0
    per_channel: bool = False
    # how the noise is made (see sources.backgrounds.PinkNoise); "white" re-makes datasets made
    # before this key existed, "spectrum" those made before "polar" was the default, "polar"
    # those made before "grid" was. The default is part of every pink-noise spec's hash, so
    # such specs hash anew and their datasets (whose stored spec names their synthesis) are
    # never re-rendered another way.
    synthesis: Literal["grid", "polar", "spectrum", "white"] = "grid"


class FolderBg(Model):
    kind: Literal["folder"]
    path: str


BackgroundSpec = Annotated[Union[SolidBg, UniformNoiseBg, GaussianNoiseBg, PinkNoiseBg, FolderBg], Field(discriminator="kind")]


class AxisSpec(Model):
    range: tuple[float, float] | None = None
    unit: str | None = None
    dist: Literal["uniform", "log"] = "uniform"
    levels: list[float] | None = None


class DistractorSpec(Model):
    count: tuple[Annotated[int, Field(ge=0, le=L.MAX_DISTRACTORS, strict=True)],
                 Annotated[int, Field(ge=0, le=L.MAX_DISTRACTORS, strict=True)]] = (0, 0)
    no_overlap: bool = True
    attempts: Annotated[int, Field(gt=0, le=L.MAX_PLACEMENT_ATTEMPTS, strict=True)] = 50

    @model_validator(mode="after")
    def _ordered(self):
        if self.count[0] > self.count[1]:
            raise SpecError(f"[{self.count[0]}, {self.count[1]}] is not [min, max] (min is above max)",
                            where="render.distractors.count")
        if self.count[1] * self.attempts > L.MAX_PLACEMENT_TRIES:
            raise SpecError(f"up to {self.count[1]} distractors x {self.attempts} attempts = "
                            f"{self.count[1] * self.attempts:,} placements tried per image, above the limit of "
                            f"{L.MAX_PLACEMENT_TRIES:,} (limits.MAX_PLACEMENT_TRIES)", where="render.distractors")
        return self


class RenderSpec(Model):
    alpha_threshold: Annotated[float, Field(ge=0, lt=1)] = 0.5
    keep_inside: bool = False
    distractors: DistractorSpec = DistractorSpec()


class SplitSpec(Model):
    region: Any = None
    per_class: ImageCount | None = None
    count: ImageCount | None = None
    instances: Literal["seen", "unseen", "all"] | None = None
    classes: list[str] | None = None
    role: Literal["train", "test"] | None = None
    kind: Literal["random", "interpolation", "extrapolation", "composition"] | None = None
    stratify: bool = False  # every region cell (disjoint box) of a class gets an equal share of its images

    @model_validator(mode="after")
    def _one_count(self):
        if (self.per_class is None) == (self.count is None):
            raise ValueError("give exactly one of per_class or count (a positive integer)")
        return self


class GuaranteeSpec(Model):
    disjoint: Literal["parameters", "footprint"]
    between: tuple[str, str]
    margin: Annotated[float, Field(ge=0)] = 0.0
    per_class: bool = False
    auto_guard: bool = False


class Spec(Model):
    seed: Annotated[int, Field(ge=0, le=L.MAX_SEED, strict=True)]
    canvas: CanvasSpec
    viewing: ViewingSpec | None = None
    objects: ObjectsSpec | None = None  # required to generate; a spec that only splits existing data has none
    background: BackgroundSpec = SolidBg(kind="solid", value=0.0)
    axes: dict[str, AxisSpec] = {}
    render: RenderSpec = RenderSpec()
    splits: dict[str, SplitSpec] = Field(min_length=1)
    guarantees: list[GuaranteeSpec] = []
    audit: dict[str, Union[bool, int, float, str]] = {}  # thresholds for `augsplit audit` (see audit/run.py)

    @field_validator("axes", mode="before")
    @classmethod
    def _axis_names(cls, v):
        if isinstance(v, dict):
            for name in v:
                if name not in BUILTIN or name == "class":
                    choices = [n for n in BUILTIN if n != "class"]
                    hint = _hint(name, choices)
                    raise ValueError(f"unknown axis '{name}'" + (f" ({hint})" if hint else "")
                                     + f"; axes are {', '.join(choices)}")
        return v

    @field_validator("splits", mode="before")
    @classmethod
    def _split_names(cls, v):  # a split name becomes folder and file names
        if isinstance(v, dict):
            for name in v:
                check_name(name, f"splits.{shown(name)}")
            check_distinct_casefold(v, "splits")
        return v

    @model_validator(mode="after")
    def _cross_checks(self):
        for i, g in enumerate(self.guarantees):
            for name in g.between:
                if name not in self.splits:
                    hint = _hint(name, self.splits)
                    raise ValueError(f"guarantees.{i}.between: unknown split '{name}'"
                                     + (f" ({hint})" if hint else "") + f"; splits are {', '.join(self.splits)}")
            if g.between[0] == g.between[1]:
                raise ValueError(f"guarantees.{i}.between: a split cannot be disjoint from itself")
        pos = {"x", "y"} & set(self.axes)
        polar = {"eccentricity", "polar_angle"} & set(self.axes)
        if pos and polar:
            raise ValueError("axes: use x/y or eccentricity/polar_angle for position, not both")
        return self


# ---- loading -------------------------------------------------------------------------------


def _loc(loc) -> str:
    return ".".join(str(p) for p in loc if not (isinstance(p, str) and p in _UNION_TAGS))


_UNION_TAGS = {"polyomino", "glyphs", "folder", "solid", "uniform_noise", "gaussian_noise", "pink_noise",
               "function-after[_one_count(), SplitSpec]", "tagged-union[PolyominoSpec,GlyphSpec,FolderSpec]",
               "constrained-float", "tuple[int, int, int]"}

# a schema bound that is one of augsplit's limits is named in the message
_LIMIT_NAMES = {v: k for k, v in vars(L).items() if k.startswith("MAX_") and isinstance(v, int)
                and sum(1 for x in vars(L).values() if x == v) == 1}


def _first_error(err: ValidationError) -> SpecError:
    e = err.errors()[0]
    where = _loc(e["loc"])
    msg = str(e["msg"]).removeprefix("Value error, ")
    if e["type"] == "missing":
        msg = "required key is missing"
    elif e["type"] == "extra_forbidden":
        msg = "unknown key"
    elif e["type"] == "less_than_equal" and e.get("ctx", {}).get("le") in _LIMIT_NAMES:
        msg += f" (limits.{_LIMIT_NAMES[e['ctx']['le']]})"
    # a message that names its own key path (cross checks) becomes the location
    if ": " in msg and msg.split(": ", 1)[0].replace(".", "").replace("_", "").isalnum() and "." in msg.split(": ", 1)[0]:
        where, msg = msg.split(": ", 1)
    return SpecError(msg, where=where or "spec")


def check_numbers(data: Any, where: str = "") -> None:
    """Every number in a parsed spec is finite and every integer fits int64 (YAML allows .nan,
    .inf and integers of any size; generate's numpy and Arrow columns do not)."""
    stack = [(data, where)]
    while stack:
        v, w = stack.pop()
        if isinstance(v, dict):
            stack.extend((x, f"{w}.{shown(k)}" if w else shown(k)) for k, x in v.items())
        elif isinstance(v, (list, tuple)):
            stack.extend((x, f"{w}.{i}") for i, x in enumerate(v))
        elif isinstance(v, float) and not math.isfinite(v):
            raise SpecError(f"{v} is not a finite number", where=w or "spec")
        elif isinstance(v, int) and not isinstance(v, bool) and not L.INT64_RANGE[0] <= v <= L.INT64_RANGE[1]:
            raise SpecError(f"the integer {v} does not fit in 64 bits", where=w or "spec")


def parse_spec(data: Any, source: str = "spec") -> Spec:
    """Validate an already-parsed YAML/JSON value."""
    if not isinstance(data, dict):
        raise SpecError(f"the spec must be a mapping of keys to values, not {type(data).__name__}", where=source)
    check_numbers(data)
    try:
        return Spec.model_validate(data)
    except ValidationError as err:
        raise _first_error(err) from None


# ---- YAML: safe, bounded, no silent duplicates, every key's line remembered ---------------------

_MERGE = "tag:yaml.org,2002:merge"


def _children(node) -> list:
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    return []


def _expanded_size(root, file: str) -> int:
    """Nodes of the document with every alias expanded where it is used, counted without
    expanding (each node once, children's counts summed); capped just above the limit."""
    cap = L.MAX_YAML_NODES + 1
    size: dict[int, int] = {}
    path: set[int] = set()  # nodes whose subtree is being counted: meeting one again is a cycle
    stack = [(root, False)]
    while stack:
        node, done = stack.pop()
        if done:
            path.discard(id(node))
            size[id(node)] = min(cap, 1 + sum(size[id(c)] for c in _children(node)))
        elif id(node) not in size:
            path.add(id(node))
            stack.append((node, True))
            for c in _children(node):
                if id(c) in path:
                    raise SpecError("an alias refers to a node that contains it (a recursive structure)",
                                    where=f"{file}:{c.start_mark.line + 1}")
                stack.append((c, False))
    return size[id(root)]


def _key_lines(root, file: str) -> dict[str, int]:
    """Dotted key path -> line of its key (1-based); refuses a key given twice in one mapping.
    Merge keys (<<) contribute the merged mapping's keys, which explicit keys override."""
    lines: dict[str, int] = {}
    stack = [(root, "")]
    while stack:
        node, path = stack.pop()
        if isinstance(node, yaml.SequenceNode):
            for i, c in enumerate(node.value):
                lines.setdefault(_joined(path, str(i)), c.start_mark.line + 1)
                stack.append((c, _joined(path, str(i))))
        elif isinstance(node, yaml.MappingNode):
            stack += _mapping_lines(node, path, file, lines)
    return lines


def _joined(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def _mapping_lines(node, path: str, file: str, lines: dict[str, int]) -> list[tuple[Any, str]]:
    """Record the lines of one mapping's keys (explicit ones, then merged ones they do not
    override); its values with their key paths, to visit next."""
    first: dict[tuple[str, Any], int] = {}
    merged = []
    children = []
    for k, v in node.value:
        if k.tag == _MERGE:
            merged += v.value if isinstance(v, yaml.SequenceNode) else [v]
            continue
        ident = (k.tag, k.value if isinstance(k, yaml.ScalarNode) else id(k))
        line = k.start_mark.line + 1
        key = shown(k.value) if isinstance(k, yaml.ScalarNode) else "?"
        p = _joined(path, key)
        if ident in first:
            raise SpecError(f"duplicate key '{key}' (first given at line {first[ident]}); a second key "
                            "would silently replace the first", where=f"{file}:{line}: {p}")
        first[ident] = line
        lines[p] = line
        children.append((v, p))
    for m in merged:  # lower precedence: only keys not given explicitly
        if not isinstance(m, yaml.MappingNode):
            continue
        for k, v in m.value:
            if isinstance(k, yaml.ScalarNode) and k.tag != _MERGE and (k.tag, k.value) not in first:
                p = _joined(path, shown(k.value))
                lines.setdefault(p, k.start_mark.line + 1)
                children.append((v, p))
    return children


@dataclass(frozen=True)
class SpecFile:
    """A parsed YAML file and the line of every key path in it, to point errors at lines."""

    path: Path
    data: Any
    lines: dict[str, int] = field(default_factory=dict, repr=False)

    def locate(self, where: str | None) -> str:
        """`file:line: key.path` for a key path of this file (its longest prefix that has a line)."""
        if where in (None, "spec", str(self.path)):
            return str(self.path)
        if ": " in where:
            return where  # located already
        probe = where.replace("[", ".").replace("]", "")
        top = probe.split(".", 1)[0]
        if top not in Spec.model_fields:
            return where  # not a key path (a file, a row...)
        cuts = [i for i, ch in enumerate(probe) if ch == "."] + [len(probe)]
        for i in reversed(cuts):
            if probe[:i] in self.lines:
                return f"{self.path}:{self.lines[probe[:i]]}: {where}"
        return f"{self.path}: {where}"

    @contextmanager
    def located(self):
        """Re-raise a SpecError with the file and line of the key path it names."""
        try:
            yield
        except SpecError as err:
            err.where = self.locate(err.where)
            err.args = (str(err),)
            raise


def _yaml_problem(exc: yaml.YAMLError, p: Path) -> SpecError:
    mark = getattr(exc, "problem_mark", None)
    where = f"{p}:{mark.line + 1}:{mark.column + 1}" if mark else str(p)
    problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
    if "\t" in problem or "'\\t'" in problem:
        problem = "a tab character; indent YAML with spaces"
    return SpecError(f"not valid YAML: {problem}", where=where)


def read_spec_file(path: str | Path, text: str | None = None) -> SpecFile:
    """Safe YAML load (no object construction) with one-line errors naming file:line:column;
    refuses files above MAX_SPEC_BYTES, alias expansion above MAX_YAML_NODES and duplicate keys.
    With `text`, the file's text as its caller read it (errors still name `path`)."""
    p = Path(path)
    if text is None:
        text = _spec_text(p)
    try:
        loader = yaml.SafeLoader(text)  # its reader refuses control characters here, not later
    except yaml.YAMLError as exc:
        raise _yaml_problem(exc, p) from None
    try:
        node = loader.get_single_node()
        if node is None:
            return SpecFile(p, None)
        n = _expanded_size(node, str(p))
        if n > L.MAX_YAML_NODES:
            raise SpecError(f"the YAML expands to more than {L.MAX_YAML_NODES:,} nodes once its aliases (*name) "
                            "are expanded (limits.MAX_YAML_NODES)", where=str(p))
        lines = _key_lines(node, str(p))
        return SpecFile(p, loader.construct_document(node), lines)
    except yaml.YAMLError as exc:
        raise _yaml_problem(exc, p) from None
    finally:
        loader.dispose()


def _spec_text(p: Path) -> str:
    if not p.is_file():  # also refuses FIFOs and devices, which could block or never end
        raise SpecError("no such file" if not p.exists() else "not a file", where=str(p))
    try:
        if p.stat().st_size > L.MAX_SPEC_BYTES:
            raise SpecError(f"the file is {p.stat().st_size:,} bytes; a spec may have at most "
                            f"{L.MAX_SPEC_BYTES:,} (limits.MAX_SPEC_BYTES)", where=str(p))
        return p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"cannot read: {exc}", where=str(p)) from None


def read_yaml(path: str | Path, text: str | None = None) -> Any:
    """The parsed YAML of a file, or of its `text` read by the caller (see read_spec_file for
    what is refused)."""
    return read_spec_file(path, text).data


def load_spec(path: str | Path) -> tuple[Spec, Path]:
    """Spec and the folder relative paths in it are resolved against."""
    f = read_spec_file(path)
    with f.located():
        spec = parse_spec(f.data, source=str(f.path))
    return spec, f.path.resolve().parent


def canonical(spec: Spec) -> str:
    """Compact JSON of the spec with every default filled in. Keys keep their order: fixed keys
    in the schema's order (so reordering them in the YAML changes nothing), user-named keys
    (splits, axes, region terms) in the spec's order, because that order fixes the split
    indices, the axes' uniforms and the boxes' order, i.e. every image's draws."""
    return json.dumps(spec.model_dump(mode="json"), separators=(",", ":"))


def spec_hash(spec: Spec) -> str:
    return hashlib.sha256(canonical(spec).encode()).hexdigest()[:16]


def builtin_spec_path(name: str = "demo") -> Path:
    return Path(__file__).parent / "builtin" / f"{name}.yaml"
