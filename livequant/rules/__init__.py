"""Decision rules: what deserves the operator's attention in a frame.

A rule is a plugin (:mod:`livequant.rules.hookspecs`); the built-in ones live
in :mod:`livequant.rules.builtin`.  :class:`RuleManager` loads and runs them,
:class:`SessionContext` keeps what they may know about the session.
"""

from livequant.rules.hookspecs import hookimpl, hookspec
from livequant.rules.manager import (BUILTIN_RULES, DescriptorStats, RuleManager, SessionContext,
                                     SessionView)
from livequant.rules.types import Flag, FrameView, Region

__all__ = ["Flag", "FrameView", "Region", "RuleManager", "SessionContext", "SessionView",
           "DescriptorStats", "BUILTIN_RULES", "hookimpl", "hookspec"]
