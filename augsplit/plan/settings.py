"""The spec's settings as plain frozen values: what every module past the planner reads
(render, scene, generate, data, albu, audit, preview, verify) instead of the pydantic Spec,
which stops at the boundary (spec.py, build.py, the planner)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Distractors:
    count: tuple[int, int] = (0, 0)  # inclusive range of extra objects per scene
    no_overlap: bool = True
    attempts: int = 50


@dataclass(frozen=True)
class RenderSettings:
    alpha_threshold: float = 0.5  # alpha above which a pixel belongs to an object's footprint
    mode: str = "rgb"  # "rgb" or "gray"
    distractors: Distractors = Distractors()
    background: str = "solid"  # the background's kind (spec.background.kind)

    @property
    def channels(self) -> int:
        return 1 if self.mode == "gray" else 3


@dataclass(frozen=True)
class Claim:
    """One guarantee as the spec states it (the planner's Verdict says whether it was proved)."""

    disjoint: str  # "parameters" | "footprint"
    between: tuple[str, str]
    margin: float = 0.0
    per_class: bool = False


@dataclass(frozen=True)
class Settings:
    seed: int
    render: RenderSettings
    canonical: str  # the spec's canonical JSON text: what files record and workers rebuild from
    claims: tuple[Claim, ...] = ()
    audit: tuple[tuple[str, object], ...] = ()  # the spec's audit: thresholds, as (key, value) pairs


def settings_of(spec) -> Settings:
    """The plain values of a validated Spec."""
    from ..spec import canonical

    r = spec.render
    d = r.distractors
    return Settings(
        seed=int(spec.seed),
        render=RenderSettings(float(r.alpha_threshold), str(spec.canvas.mode),
                              Distractors((int(d.count[0]), int(d.count[1])), bool(d.no_overlap), int(d.attempts)),
                              str(spec.background.kind)),
        canonical=canonical(spec),
        claims=tuple(Claim(g.disjoint, tuple(g.between), float(g.margin), bool(g.per_class)) for g in spec.guarantees),
        audit=tuple(sorted(dict(spec.audit or {}).items())),
    )
