"""Object sources (polyominoes, glyphs, the user's sprite folder) and backgrounds, behind the
ObjectSource / Background interfaces of `base`; `OBJECT_KINDS` and `BACKGROUND_KINDS` map the
spec's `kind:` names to their constructors.
"""

from .backgrounds import GaussianNoise, ImageFolder, PinkNoise, Solid, UniformNoise
from .base import ALPHA_THRESHOLD, Background, ObjectSource, Sprite, iter_sprites
from .folder import SpriteFolder
from .glyphs import Glyphs
from .polyomino import Polyominoes

OBJECT_KINDS = {"polyomino": Polyominoes, "glyphs": Glyphs, "folder": SpriteFolder}
BACKGROUND_KINDS = {
    "solid": Solid,
    "uniform_noise": UniformNoise,
    "gaussian_noise": GaussianNoise,
    "pink_noise": PinkNoise,
    "image_folder": ImageFolder,
}

__all__ = [
    "ALPHA_THRESHOLD", "Background", "ObjectSource", "Sprite", "iter_sprites",
    "Polyominoes", "Glyphs", "SpriteFolder",
    "Solid", "UniformNoise", "GaussianNoise", "PinkNoise", "ImageFolder",
    "OBJECT_KINDS", "BACKGROUND_KINDS",
]
