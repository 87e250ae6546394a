"""The terminal display: a pure snapshot -> renderable function and its Live wrapper."""

from livequant.display.live import LiveDisplay
from livequant.display.status import render_status

__all__ = ["render_status", "LiveDisplay"]
