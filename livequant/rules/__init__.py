"""Decision rules: what deserves the operator's attention in a frame."""

from livequant.rules.types import Flag, FrameView, Region

__all__ = ["Flag", "FrameView", "Region"]
