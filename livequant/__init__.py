"""livequant: real-time quantitative analysis beside an atomic-resolution STEM session."""

from livequant.frames import Frame, FrameError, FrameMeta, read_frame
from livequant.rules.hookspecs import hookimpl

__version__ = "0.1.0"

__all__ = ["Frame", "FrameError", "FrameMeta", "read_frame", "hookimpl", "__version__"]
