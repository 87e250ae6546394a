"""The session report: ``livequant report SESSION`` writes ``SESSION/report/index.html``.

* :mod:`livequant.report.data` reads the ledger and the per-frame files;
* :mod:`livequant.report.maps` turns cells into grids, winding maps and wall profiles;
* :mod:`livequant.report.figures` draws (arrays in, matplotlib Figure out, Agg only);
* :mod:`livequant.report.page` writes the self-contained HTML;
* :mod:`livequant.report.build` puts them together (:func:`build_report`).

The names below are imported on first use (PEP 562): ``livequant --help``
must not load matplotlib.
"""

__all__ = ["build_report", "DEFAULT_MAX_FRAMES", "SessionError"]

_LAZY = {"build_report": "livequant.report.build", "SessionError": "livequant.report.data",
         "DEFAULT_MAX_FRAMES": "livequant.report.defaults"}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'livequant.report' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
