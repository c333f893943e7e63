"""augsplit: datasets whose test splits come from whole regions of transform space."""

__version__ = "0.1.0"
