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


from livequant._lazy import lazy_names  # noqa: E402

__getattr__, __dir__ = lazy_names(__name__, _LAZY, __all__)
