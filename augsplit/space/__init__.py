"""Transform space: axes, regions (set algebra over disjoint boxes), exact sampling."""

from .axes import BUILTIN, CIRCULAR, LEVELS, LINEAR, LOG, Axis, Space
from .region import Region
from .sample import image_rng, image_uniforms, sample, sample_t

__all__ = ["BUILTIN", "CIRCULAR", "LEVELS", "LINEAR", "LOG", "Axis", "Space", "Region",
           "image_rng", "image_uniforms", "sample", "sample_t"]
