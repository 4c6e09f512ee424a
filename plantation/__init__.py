"""plantation: map the year natural forest became tree-crop plantation, pixel by pixel, with honest uncertainty."""

__version__ = "0.1.0"
