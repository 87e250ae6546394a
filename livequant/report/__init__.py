"""The session report: ``livequant report SESSION`` writes ``SESSION/report/index.html``.

* :mod:`livequant.report.data` reads the ledger and the per-frame files;
* :mod:`livequant.report.maps` turns cells into grids, winding maps and wall profiles;
* :mod:`livequant.report.figures` draws (arrays in, matplotlib Figure out, Agg only);
* :mod:`livequant.report.page` writes the self-contained HTML;
* :mod:`livequant.report.build` puts them together (:func:`build_report`).
"""

from livequant.report.build import DEFAULT_MAX_FRAMES, build_report
from livequant.report.data import SessionError

__all__ = ["build_report", "DEFAULT_MAX_FRAMES", "SessionError"]
