"""livequant: real-time analysis beside an atomic-resolution STEM session.

The names below are imported on first use (PEP 562), so that ``livequant
--help`` and the operator's commands (``status``, ``proposals``, ``accept``,
``reject``) start without loading numpy, numba, scipy or matplotlib.
"""

__version__ = "0.1.0"

__all__ = ["Frame", "FrameError", "FrameMeta", "read_frame", "hookimpl", "analyze",
           "open_session", "__version__"]

# The names are imported on first use, so `import livequant` (and every command's
# start-up) stays light; the notebook API (livequant/api.py) loads the analysis then.
_LAZY = {"Frame": "livequant.frames", "FrameError": "livequant.frames",
         "FrameMeta": "livequant.frames", "read_frame": "livequant.frames",
         "hookimpl": "livequant.rules.hookspecs", "analyze": "livequant.api",
         "open_session": "livequant.api"}


from livequant._lazy import lazy_names  # noqa: E402

__getattr__, __dir__ = lazy_names(__name__, _LAZY, __all__)
