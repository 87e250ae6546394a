"""Load the multislice test frames in tests/data/multislice (numpy and json only).

The frames were made with an open multislice simulator (abTEM; Madsen & Susi, Open
Research Europe 1, 24 (2021); method: Kirkland, Advanced Computing in Electron
Microscopy, 2nd ed. 2010) by ``tests/data/multislice/make_frames.py``; see the README
there. They are noiseless; :func:`noisy` adds Poisson noise with a fixed seed.

Conventions (the same in every frame):

* ``image[row, col] = image[y, x]``; pixel (r, c) is the signal with the probe at
  x = c * pixel_size_pm, y = r * pixel_size_pm from the scan origin, so pixel centres
  sit at integer pixel coordinates and pixel (0, 0) is the scan origin.
* ``truth`` rows give ``x_px`` (column axis) and ``y_px`` (row axis) in those
  coordinates: the mean projected position of the atoms put in (no phonons).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

DATA_DIR = Path(__file__).parent / "data" / "multislice"
FRAME_NAMES = (
    "sto_haadf",
    "sto_abf",
    "pto_domains_haadf",
    "bto_haadf",
    "abf_rotation",
    "abf_rotation_antiphase",
)


def load_frame(name: str, *, data_dir: Path | str = DATA_DIR):
    """Load one multislice frame with its settings and truth.

    Parameters
    ----------
    name : str
        Frame name, one of ``FRAME_NAMES`` (the stem of ``NAME.npy`` / ``NAME.json``).
    data_dir : path, optional
        Folder holding the frames.

    Returns
    -------
    image : ndarray of float64, shape (256, 256)
        Noiseless detector signal (fraction of the incident probe intensity).
    meta : dict
        Every setting of the simulation (``pixel_size_pm``, detector angles, ...), without
        the truth.
    truth : list of dict
        One row per projected column inside the frame: ``x_px``, ``y_px``, ``site``
        (``"A"``, ``"B"`` or ``"O"``), ``elements``, cell indices ``i`` and ``j`` and
        frame-specific keys (``domain``, ``imposed_dy_pm``, ``rotation_sign``, ...).

    Raises
    ------
    FileNotFoundError
        If the frame's ``.npy`` or ``.json`` file is missing (names in the message).
    """
    data_dir = Path(data_dir)
    npy, js = data_dir / f"{name}.npy", data_dir / f"{name}.json"
    missing = [str(p) for p in (npy, js) if not p.is_file()]
    if missing:
        raise FileNotFoundError(
            f"multislice frame {name!r} not found: missing {', '.join(missing)}; "
            f"known frames: {', '.join(FRAME_NAMES)}"
        )
    image = np.load(npy).astype(np.float64)
    meta = json.loads(js.read_text())
    truth = meta.pop("truth")
    return image, meta, truth


def noisy(image, electrons_per_pixel_mean: float, seed: int):
    """Poisson-noisy copy of a noiseless frame at a given mean dose.

    The frame is scaled so that its mean pixel holds ``electrons_per_pixel_mean``
    electrons (the expected counts), then counts are drawn from the Poisson distribution
    with ``np.random.default_rng(seed)``.

    Parameters
    ----------
    image : ndarray
        Noiseless, non-negative frame (e.g. from :func:`load_frame`).
    electrons_per_pixel_mean : float
        Mean expected counts per pixel, > 0.
    seed : int
        Seed of the local generator.

    Returns
    -------
    counts : ndarray of float64
        Poisson counts, same shape as ``image``.

    Raises
    ------
    ValueError
        If the dose is not positive or the image has negative or non-finite pixels.
    """
    image = np.asarray(image, dtype=np.float64)
    if not electrons_per_pixel_mean > 0:
        raise ValueError(f"electrons_per_pixel_mean must be > 0, got {electrons_per_pixel_mean}")
    if not np.all(np.isfinite(image)) or image.min() < 0 or image.mean() <= 0:
        raise ValueError("image must be finite, non-negative and not all zero")
    expected = image * (electrons_per_pixel_mean / image.mean())
    return np.random.default_rng(seed).poisson(expected).astype(np.float64)


def truth_array(truth, *, site: str | None = None):
    """(N, 2) array of truth (x_px, y_px), optionally for one site ("A", "B", "O")."""
    rows = [t for t in truth if site is None or t["site"] == site]
    return np.array([[t["x_px"], t["y_px"]] for t in rows], dtype=float).reshape(-1, 2)
