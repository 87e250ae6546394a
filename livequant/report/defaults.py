"""Defaults of ``livequant report`` (no plotting imports: the command line reads them)."""

#: Frames of interest drawn in full by default.
DEFAULT_MAX_FRAMES = 6
#: At most this many done frames (evenly spread over the session) feed the histograms.
DEFAULT_HISTOGRAM_FRAMES = 100
