"""Image files: OpenEXR in and out, PNG out."""

from .exr import read_exr, write_exr
from .png import write_png

__all__ = ["read_exr", "write_exr", "write_png"]
