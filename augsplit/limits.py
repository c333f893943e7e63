"""Every size and count a spec or an option can ask for, bounded before anything is allocated.

One constant per limit, checked where the value first comes in (the spec's schema, the
region language, an image file's header, the generate options); the refusal names the
limit. The values keep one image, one sprite and one plan well inside a few GB of memory.
"""

from __future__ import annotations

# ---- the spec file -----------------------------------------------------------------------
MAX_SPEC_BYTES = 4 << 20  # a spec file is read whole; hand-written specs are a few kB
MAX_YAML_NODES = 100_000  # YAML nodes after alias expansion (an "alias bomb" expands exponentially)

# ---- numbers ---------------------------------------------------------------------------
MAX_SEED = 2**63 - 1  # the manifest stores the seed as int64
INT64_RANGE = (-(2**63), 2**63 - 1)  # any integer in a spec (they all end up in numpy/Arrow columns)
# an axis value (range end or level), in the axis's unit: far beyond any canvas position in px,
# any angle or hue in degrees; bounded so region masses and positions stay finite (common
# practice, no source: a range of [-1e308, 1e308] overflowed to an infinite width)
MAX_AXIS_VALUE = 1e9

# ---- images and canvases -------------------------------------------------------------------
MAX_CANVAS_SIDE = 16384  # px, width or height
MAX_CANVAS_PIXELS = 1 << 24  # width x height (4096 x 4096); a pink-noise canvas then takes ~1 GB
MAX_SPRITE_PIXELS = 1 << 22  # one object sprite (2048 x 2048)
MAX_SCALED_SPRITE_PIXELS = 1 << 25  # a sprite's warp box at the largest scale, any angle (float32 RGBA: 512 MB)
MAX_SPRITE_SIDE = 8192  # px, a sprite's width or height (glyph height_px, polyomino extent)
MAX_SOURCE_PIXELS = 1 << 26  # all sprites of an object source together (the renderer caches ~80 B/px)
MAX_BACKGROUND_PIXELS = 1 << 25  # one background image (e.g. 8192 x 4096)
MAX_BACKGROUNDS_PIXELS = 1 << 27  # all background images together (kept decoded in memory)
MAX_IMAGE_FILE_BYTES = 256 << 20  # an image file is read whole before its header is checked
MAX_METADATA_BYTES = 64 << 20  # a dataset's spec.json or dataset.json, read whole (they are a few kB to a few MB)

# ---- counts ----------------------------------------------------------------------------------
MAX_CLASSES = 10_000  # an object source's classes (10-cell one-sided polyominoes: 9,189)
MAX_SPLIT_IMAGES = 10_000_000  # image ids are <split>-<index:07d>
MAX_IMAGES = 100_000_000  # all splits together
MAX_SHARDS_PER_SPLIT = 1_000_000  # manifest parts are part-<shard:06d>
MAX_GRID_CELLS = 2500  # cells of one `cells: {grid: ...}` region term (e.g. 50 x 50)
MAX_REGION_BOXES = 2500  # boxes of any region term (set operations cost the product of box counts)
MAX_DISTRACTORS = 100  # extra objects in one image
MAX_PLACEMENT_ATTEMPTS = 1000  # tries to place one distractor without overlap
MAX_PLACEMENT_TRIES = 10_000  # distractors x attempts: placements tried for one image (~0.3 ms each)
MAX_WORKERS = 256  # with --force-workers; otherwise min(shards, CPU cores)
MAX_NAME_LENGTH = 128  # characters of a split, class or instance name (names.py)
