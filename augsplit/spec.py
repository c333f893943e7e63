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
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import SpecError
from .space.axes import BUILTIN

PosInt = Annotated[int, Field(gt=0, strict=True)]
NonNegInt = Annotated[int, Field(ge=0, strict=True)]
PosFloat = Annotated[float, Field(gt=0)]
Colour = Union[float, tuple[int, int, int]]


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


class CanvasSpec(Model):
    width: PosInt
    height: PosInt
    mode: Literal["rgb", "gray"] = "rgb"


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
    # before this key existed. The default is part of every pink-noise spec's hash, so such
    # specs hash anew and their datasets are never silently re-rendered another way.
    synthesis: Literal["spectrum", "white"] = "spectrum"


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
    count: tuple[NonNegInt, NonNegInt] = (0, 0)
    no_overlap: bool = True
    attempts: PosInt = 50


class RenderSpec(Model):
    alpha_threshold: Annotated[float, Field(ge=0, lt=1)] = 0.5
    keep_inside: bool = False
    distractors: DistractorSpec = DistractorSpec()


class SplitSpec(Model):
    region: Any = None
    per_class: PosInt | None = None
    count: PosInt | None = None
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
    seed: NonNegInt
    canvas: CanvasSpec
    viewing: ViewingSpec | None = None
    objects: ObjectsSpec
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
               "function-after[_one_count(), SplitSpec]", "tagged-union[PolyominoSpec,GlyphSpec,FolderSpec]"}


def _first_error(err: ValidationError) -> SpecError:
    e = err.errors()[0]
    where = _loc(e["loc"])
    msg = str(e["msg"]).removeprefix("Value error, ")
    if e["type"] == "missing":
        msg = "required key is missing"
    elif e["type"] == "extra_forbidden":
        msg = "unknown key"
    # a message that names its own key path (cross checks) becomes the location
    if ": " in msg and msg.split(": ", 1)[0].replace(".", "").replace("_", "").isalnum() and "." in msg.split(": ", 1)[0]:
        where, msg = msg.split(": ", 1)
    return SpecError(msg, where=where or "spec")


def parse_spec(data: Any, source: str = "spec") -> Spec:
    """Validate an already-parsed YAML/JSON value."""
    if not isinstance(data, dict):
        raise SpecError(f"the spec must be a mapping of keys to values, not {type(data).__name__}", where=source)
    try:
        return Spec.model_validate(data)
    except ValidationError as err:
        raise _first_error(err) from None


def read_yaml(path: str | Path) -> Any:
    """Safe YAML load (no object construction) with one-line errors naming file:line:column."""
    p = Path(path)
    if not p.is_file():
        raise SpecError("no such file" if not p.exists() else "not a file", where=str(p))
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"cannot read: {exc}", where=str(p)) from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"{p}:{mark.line + 1}:{mark.column + 1}" if mark else str(p)
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        if "\t" in problem or "'\\t'" in problem:
            problem = "a tab character; indent YAML with spaces"
        raise SpecError(f"not valid YAML: {problem}", where=where) from None


def load_spec(path: str | Path) -> tuple[Spec, Path]:
    """Spec and the folder relative paths in it are resolved against."""
    p = Path(path)
    return parse_spec(read_yaml(p), source=str(p)), p.resolve().parent


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
