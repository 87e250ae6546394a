"""Example rule: strain hotspots -- copy this file to start your own rule.

What it proposes and why: a closer look wherever the lattice is locally strained
well beyond the rest of the frame -- the largest principal strain of a cell (against
the frame's reference cell) above ``min_strain_pct`` in at least ``min_cells``
neighbouring cells.  Strain concentrates around dislocation cores, point-defect
clusters and chemically expanded regions, which are worth a higher-magnification
frame while the specimen is still in the microscope.

Load it with ``rules.plugin_dirs = ["plugins"]``; set its options in the config::

    [rules.options.strain_hotspot]
    min_strain_pct = 1.5   # largest principal strain of a cell, percent
    min_snr = 3.0          # that strain over its uncertainty (ratio)
    min_cells = 2          # neighbouring cells needed (count)
"""

import numpy as np
from scipy import ndimage

from livequant import hookimpl
from livequant.rules import Flag, Region

DEFAULTS = {"min_strain_pct": 1.5, "min_snr": 3.0, "min_cells": 2}


class StrainHotspot:
    """A rule with settings is a small class: one instance per rule manager."""

    def __init__(self):
        self.options = dict(DEFAULTS)

    @hookimpl
    def livequant_configure(self, config):
        given = dict(config.rules.options.get("strain_hotspot", {}))
        unknown = set(given) - set(DEFAULTS)
        if unknown:  # a typo must stop start-up, not be ignored for a session
            raise ValueError(f"unknown option(s) {sorted(unknown)}; known: {sorted(DEFAULTS)}")
        self.options.update(given)

    @hookimpl
    def livequant_frame_rules(self, view):
        c = view.cells
        if c is None or len(c["i"]) == 0:
            return []
        # Largest principal strain |(exx + eyy) / 2| + sqrt(((exx - eyy) / 2)^2 + exy^2).
        mean = (c["exx"] + c["eyy"]) / 2
        radius = np.hypot((c["exx"] - c["eyy"]) / 2, c["exy"])
        e_max = np.abs(mean) + radius
        sigma = np.fmax(c["sigma_exx"], c["sigma_eyy"])   # rough, on the safe side
        with np.errstate(invalid="ignore"):
            hot = (e_max * 100 > self.options["min_strain_pct"]) & \
                  (e_max / sigma > self.options["min_snr"])
        if not hot.any():
            return []
        # Cluster neighbouring hot cells on the (i, j) grid.
        i, j = c["i"] - c["i"].min(), c["j"] - c["j"].min()
        grid = np.zeros((i.max() + 1, j.max() + 1), bool)
        grid[i[hot], j[hot]] = True
        labels, n = ndimage.label(grid, structure=np.ones((3, 3)))
        cell_label = np.where(hot, labels[i, j], 0)
        cell_px = np.median(c["a_pm"][np.isfinite(c["a_pm"])]) / view.pixel_size_pm
        flags = []
        for k in range(1, n + 1):
            members = cell_label == k
            if members.sum() < self.options["min_cells"]:
                continue
            peak = float(np.nanmax(e_max[members]))
            region = Region.around(c["x_px"][members], c["y_px"][members], margin_px=cell_px)
            flags.append(Flag(
                "strain-hotspot", min(1.0, peak * 100 / (4 * self.options["min_strain_pct"])),
                region, f"strain hotspot: {100 * peak:.1f} % principal strain in "
                        f"{int(members.sum())} cells",
                {"peak_strain_pct": 100 * peak, "n_cells": int(members.sum())}))
        return flags


def create_plugin():
    """Called by the rule manager when it loads this file: a fresh rule object."""
    return StrainHotspot()
