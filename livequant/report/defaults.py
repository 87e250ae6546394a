"""Defaults of ``livequant report`` (no plotting imports: the command line reads them)."""

#: Frames of interest drawn in full by default.
DEFAULT_MAX_FRAMES = 6
#: At most this many done frames (evenly spread over the session) feed the histograms.
DEFAULT_HISTOGRAM_FRAMES = 100
#: PNG resolution: 150 dpi fills a 1920-pixel-wide projector with the 12-inch figures.
DEFAULT_DPI = 150.0
#: Every PNG gets a vector twin in this format (for slides and print).
DEFAULT_VECTOR = "svg"
VECTOR_FORMATS = ("svg", "pdf", "none")
#: Gaussian smoothing of the |P| and strain maps drawn beside the raw ones, sigma in cells.
DEFAULT_SMOOTH_CELLS = 1.0
