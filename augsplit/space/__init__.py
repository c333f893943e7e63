"""Transform space: axes, regions (set algebra over disjoint boxes), exact sampling, streams."""

from .axes import BUILTIN, CIRCULAR, LEVELS, LINEAR, LOG, Axis, Space
from .region import Region
from .sample import sample, sample_t
from .streams import image_rng, image_uniforms

__all__ = ["BUILTIN", "CIRCULAR", "LEVELS", "LINEAR", "LOG", "Axis", "Space", "Region",
           "image_rng", "image_uniforms", "sample", "sample_t"]
