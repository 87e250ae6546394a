"""livequant: real-time quantitative analysis beside an atomic-resolution STEM session."""

from livequant.frames import Frame, FrameError, FrameMeta, read_frame
from livequant.rules.hookspecs import hookimpl

__version__ = "0.1.0"

__all__ = ["Frame", "FrameError", "FrameMeta", "read_frame", "hookimpl", "analyze",
           "open_session", "__version__"]


def __getattr__(name):
    # The notebook API (livequant/api.py) loads the analysis only when first used, so
    # `import livequant` (and every command's start-up) stays light.
    if name in ("analyze", "open_session"):
        from livequant import api

        return getattr(api, name)
    raise AttributeError(f"module 'livequant' has no attribute {name!r}")
