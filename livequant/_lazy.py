"""One lazy-import helper for the package's ``__init__`` files (PEP 562).

``livequant --help`` and the operator's commands must start without numpy,
numba, scipy or matplotlib; so the packages list their public names and the
module each lives in, and import it on first use.
"""

from __future__ import annotations

import importlib
import sys

__all__ = ["lazy_names"]


def lazy_names(package: str, table: dict[str, str], public: list[str]):
    """``(__getattr__, __dir__)`` for `package` whose names live in the modules of
    `table` (name -> module); each is imported and cached on first access."""

    def __getattr__(name):
        module = table.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(module), name)
        setattr(sys.modules[package], name, value)
        return value

    def __dir__():
        return sorted(set(vars(sys.modules[package])) | set(public))

    return __getattr__, __dir__
