"""The output schema: every field of ``columns.csv``, ``cells.csv`` and ``summary.json``.

Each field has a name, a unit and a definition.  The schema ships with the
package (this module), is written beside each frame's files as
``schema.json`` (:func:`schema_json`), and ``docs/outputs.md`` is generated
from it (``python -m livequant.schema --markdown > docs/outputs.md``; a test
checks the page is current and that every column written has an entry).

Conventions: ``x`` is the image column axis, ``y`` the image row axis (pointing
down); angles and rotations run from +x towards +y.  ``sigma_<name>`` is the
one-standard-deviation uncertainty of ``<name>``, in its unit.  Strains are
fractions (0.01 = 1 %).  Counts are the image's own values (detector counts
as stored in the frame file, not electrons).

Renamed in this release (the old names are still written, beside the new
ones, and go in the next release; see ``TODO.md``): :data:`RENAMED_CELL_FIELDS`
in ``cells.csv`` and :data:`RENAMED_WALL_KEYS` in ``summary.json``.
"""

from __future__ import annotations

import json

__all__ = ["SCHEMA_VERSION", "COLUMNS", "CELLS", "SUMMARY", "RENAMED_CELL_FIELDS",
           "RENAMED_WALL_KEYS", "schema", "schema_json", "markdown", "field_names"]

SCHEMA_VERSION = 1

#: cells.csv: old name -> new name.  Both are written in this release.
RENAMED_CELL_FIELDS = {
    "ratio_b_a": "amplitude_ratio_b_a",     # beside b_over_a (a lattice ratio) it read as one
    "c_over_a": "tetragonality",            # it is max/min of the in-plane a and b, not c/a
}
#: summary.json ``cells.wall`` / ``cells.wall_candidate``: old key -> new key (with unit).
RENAMED_WALL_KEYS = {
    "x0": "x0_pm", "sigma_x0": "sigma_x0_pm", "width": "width_pm",
    "sigma_width": "sigma_width_pm", "p0": "p0_pm", "sigma_p0": "sigma_p0_pm",
    "correlation_length": "correlation_length_pm", "width_80": "width_80_pm",
}

_ONE = "1"  # dimensionless
_FRACTION = "1 (fraction; 0.01 = 1 %)"

# (name, unit, definition); a field with an uncertainty lists its sigma_ entry right after.
COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("x_px", "px", "Fitted column centre along the image columns (x), sub-pixel; integer "
                   "values are pixel centres, 0 the first column."),
    ("y_px", "px", "Fitted column centre along the image rows (y, pointing down)."),
    ("x_pm", "pm", "x_px times the frame's pixel size."),
    ("y_pm", "pm", "y_px times the frame's pixel size."),
    ("sigma_x_pm", "pm", "One-sigma uncertainty of x from the covariance of the Poisson-"
                         "weighted fit."),
    ("sigma_y_pm", "pm", "One-sigma uncertainty of y, as sigma_x_pm."),
    ("amplitude", "counts", "Peak height of the fitted 2D Gaussian above the local background, "
                            "in the image's own counts (as stored in the frame file)."),
    ("width_pm", "pm", "Gaussian standard deviation sigma of the column (geometric mean of the "
                       "two principal axes); not the FWHM, which is 2.3548 sigma."),
    ("sublattice", "-", "Site of the column in the perovskite cell: A (corner), B (centre), "
                        "Oa (edge midpoint along a), Ob (edge midpoint along b)."),
    ("i", "-", "Cell index along the lattice vector a (of the cell's A corner)."),
    ("j", "-", "Cell index along the lattice vector b."),
    ("background", "counts/px", "Fitted constant local background under the column, image "
                                "counts per pixel."),
    ("reduced_chi2", _ONE, "Reduced chi-square of the column's fit window (about 1 for a good "
                           "fit under Poisson noise with gain 1)."),
    ("significance", _ONE, "|amplitude| / sigma(amplitude): how clearly the column stands out. "
                           "Weak columns (low dose) are fitted where the lattice puts them and "
                           "kept; below analysis.refine.min_significance (default 2) a fit "
                           "counts as failed and its position is the starting one with NaN "
                           "sigmas."),
)

_CELL_BASE: tuple[tuple[str, str, str], ...] = (
    ("i", "-", "Cell index along a (the A corner at origin + i a + j b)."),
    ("j", "-", "Cell index along b."),
    ("x_pm", "pm", "Cell centre (mean of its four A corners), x."),
    ("y_pm", "pm", "Cell centre, y (image rows, pointing down)."),
)

#: Descriptors of cells.csv: (name, unit, definition, has sigma_).
_CELL_DESCRIPTORS: tuple[tuple[str, str, str, bool], ...] = (
    ("dx_pm", "pm", "B-site displacement from the centre of its four A neighbours, x.", True),
    ("dy_pm", "pm", "B-site displacement, y (image rows, pointing down).", True),
    ("d_pm", "pm", "Magnitude of the B-site displacement.", True),
    ("d_angle_deg", "deg", "Direction of the B-site displacement, atan2(dy, dx).", True),
    ("d_a_pm", "pm", "B-site displacement along the cell's own a axis.", True),
    ("d_b_pm", "pm", "B-site displacement along the cell's own b axis.", True),
    ("pol_x_C_per_m2", "C/m^2", "Polarization estimate, x: in-plane, B-cation-only Born-charge "
                                "estimate P = s (e/Omega) Z*_B u_B-A (oxygen not included). NaN "
                                "without a material that has a Born charge (--material).", True),
    ("pol_y_C_per_m2", "C/m^2", "Polarization estimate, y (as pol_x_C_per_m2).", True),
    ("a_pm", "pm", "Local lattice parameter along a (from the cell's four A corners).", True),
    ("b_pm", "pm", "Local lattice parameter along b.", True),
    ("b_over_a", _ONE, "Lattice ratio |b| / |a| of the cell, with the frame's labelling of the "
                       "axes (a is the frame's shorter basis vector).", True),
    ("c_over_a", _ONE, "Deprecated name of tetragonality (it is not c/a in general).", True),
    ("exx", _FRACTION, "Strain xx against the reference lattice (summary cells.reference), from "
                       "column positions. Figures show it in %.", True),
    ("eyy", _FRACTION, "Strain yy, as exx.", True),
    ("exy", _FRACTION, "Shear strain xy (tensor component: half the engineering shear).", True),
    ("rotation_deg", "deg", "Local lattice rotation against the reference, from +x towards +y.",
     True),
    ("gpa_exx", _FRACTION, "Strain xx by geometric phase analysis of the image (Hytch, Snoeck "
                           "& Kilaas, Ultramicroscopy 74, 131 (1998)).", False),
    ("gpa_eyy", _FRACTION, "Strain yy by geometric phase analysis.", False),
    ("gpa_exy", _FRACTION, "Shear strain xy by geometric phase analysis.", False),
    ("gpa_rotation_deg", "deg", "Local rotation by geometric phase analysis.", False),
    ("tilt_deg", "deg", "Octahedral rotation about the beam, from the O columns (ABF or BF "
                        "only).", True),
    ("tilt_staggered_deg", "deg", "tilt_deg times (-1)^(i+j): uniform for an anti-phase "
                                  "pattern.", False),
    ("ratio_b_a", _ONE, "Deprecated name of amplitude_ratio_b_a.", True),
    ("amplitude_ratio_b_a", _ONE, "Column intensity ratio: the B column's fitted amplitude over "
                                  "the mean amplitude of its four A corners (an intensity, not a "
                                  "lattice ratio; compare b_over_a).", True),
    ("tetragonality", _ONE, "max(|a|, |b|) / min(|a|, |b|) of the cell's in-plane (projected) "
                            "lattice vectors: the c/a ratio when the long axis lies in the "
                            "image plane, otherwise close to 1.", True),
)


def _cells_fields() -> tuple[tuple[str, str, str], ...]:
    out = list(_CELL_BASE)
    for name, unit, definition, has_sigma in _CELL_DESCRIPTORS:
        out.append((name, unit, definition))
        if has_sigma:
            out.append((f"sigma_{name}", unit, f"One-sigma uncertainty of {name}, propagated "
                                               "from the column-position uncertainties."))
    return tuple(out)


CELLS = _cells_fields()

#: summary.json, by dotted key (``cells.wall.x0_pm``); a trailing ``.*`` documents a mapping.
SUMMARY: tuple[tuple[str, str, str], ...] = (
    ("frame_id", "-", "The frame's id (sidecar frame_id, else the file stem)."),
    ("status", "-", "ok, or no-lattice (blank, noise, amorphous: no columns fitted)."),
    ("message", "-", "One line on the outcome."),
    ("shape", "px", "Image size [rows, columns]."),
    ("pixel_size_pm", "pm", "Pixel size used (sidecar, TIFF resolution tags or configuration; "
                            "meta.extra.pixel_size_source says which)."),
    ("n_columns", "-", "Columns fitted."),
    ("n_converged", "-", "Columns whose fit converged."),
    ("columns_per_sublattice.*", "-", "Columns per sublattice (A, B, Oa, Ob)."),
    ("median_sigma_position_pm", "pm", "Median position uncertainty of the converged columns."),
    ("tilted_background.*", "-", "Per sublattice given the tilted-background refit "
                                 "(analysis.refine.background): window_radius_px (px, the "
                                 "refit's window), slope_chi2 (mean b^T C^-1 b of the free "
                                 "background slopes: about 2 where they are only noise, "
                                 "larger where neighbours' tails tilt the background), "
                                 "refitted and of (columns that took the refit, of those "
                                 "tried)."),
    ("lattice.a_pm", "pm", "Frame lattice parameter along a (least squares over the columns)."),
    ("lattice.sigma_a_pm", "pm", "Its uncertainty."),
    ("lattice.b_pm", "pm", "Frame lattice parameter along b."),
    ("lattice.sigma_b_pm", "pm", "Its uncertainty."),
    ("lattice.angle_deg", "deg", "Angle between a and b."),
    ("lattice.sigma_angle_deg", "deg", "Its uncertainty."),
    ("lattice.orientation_deg", "deg", "Direction of a in the image, from +x towards +y."),
    ("lattice.quality", _ONE, "Strength of the lattice peaks (larger is clearer)."),
    ("lattice.method", "-", "columns (fitted) or fft (Fourier estimate only)."),
    ("calibration.material", "-", "Reference material of the pixel-size check."),
    ("calibration.axis", "-", "Lattice axis compared: a, b or mean."),
    ("calibration.reference_pm", "pm", "Handbook lattice parameter (config/materials.toml)."),
    ("calibration.measured_pm", "pm", "Measured lattice parameter with the given pixel size."),
    ("calibration.sigma_measured_pm", "pm", "Its uncertainty."),
    ("calibration.relative_error", _FRACTION, "measured / reference - 1."),
    ("calibration.implied_pixel_size_pm", "pm", "The pixel size that makes measured equal "
                                                "reference: the corrected pixel size to apply."),
    ("calibration.sigma_implied_pixel_size_pm", "pm", "Its uncertainty."),
    ("calibration.apply", "-", "The setting that applies the corrected pixel size, e.g. "
                               "--pixel-size-pm 9.3699."),
    ("timings_s.*", "s", "Seconds per pipeline stage and in total."),
    ("meta.*", "-", "The frame's resolved metadata (sidecar over defaults), as in DESIGN.md; "
                    "meta.extra holds unknown sidecar keys and provenance."),
    ("cells.n_cells", "-", "Cells with descriptors."),
    ("cells.descriptors.*", "-", "Per descriptor of cells.csv: n, mean, median, std and "
                                 "median_sigma, in the descriptor's unit."),
    ("cells.local_lattice.*", "-", "The a_pm, b_pm, b_over_a, tetragonality (and c_over_a, "
                                   "deprecated) entries of cells.descriptors."),
    ("cells.pixel_size_pm", "pm", "Pixel size used for the cells."),
    ("cells.material", "-", "Material of the specimen (--material), or null: then no "
                            "polarization (pol_* are NaN) and strain is against the frame's "
                            "median cell."),
    ("cells.detector", "-", "Detector (HAADF, ABF, BF)."),
    ("cells.reference.*", "pm", "The strain reference: description, a_pm, b_pm and the basis "
                                "vectors a_xy_pm, b_xy_pm."),
    ("cells.polarization.*", "-", "label (the estimate's definition), computed, reason when not "
                                  "computed."),
    ("cells.gpa.*", "-", "Geometric phase analysis: computed, mask_sigma_per_px (1/px), "
                         "resolution_pm, margin_pm, n_cells_inside, median differences to the "
                         "column strain (fractions)."),
    ("cells.tilt.*", "-", "Octahedral tilt: computed, reason when not."),
    ("cells.wall", "-", "Fit of one straight 180-degree domain wall, P(x) = P0 tanh((x - x0)/w), "
                        "or null; keys below."),
    ("cells.wall.x0_pm", "pm", "Wall position along its normal, from the fit's centre point."),
    ("cells.wall.sigma_x0_pm", "pm", "Its uncertainty."),
    ("cells.wall.width_pm", "pm", "Half-width w of the tanh profile (w = sqrt(2) xi)."),
    ("cells.wall.sigma_width_pm", "pm", "Its uncertainty."),
    ("cells.wall.correlation_length_pm", "pm", "Correlation length xi = w / sqrt(2) (Ginzburg-"
                                               "Landau)."),
    ("cells.wall.width_80_pm", "pm", "Distance over which P goes from -80 % to +80 % of P0."),
    ("cells.wall.p0_pm", "pm", "Amplitude P0 of the profile, in pm of B-site displacement."),
    ("cells.wall.sigma_p0_pm", "pm", "Its uncertainty."),
    ("cells.wall.p0_C_per_m2", "C/m^2", "P0 as polarization (with a material)."),
    ("cells.wall.sigma_p0_C_per_m2", "C/m^2", "Its uncertainty."),
    ("cells.wall.reduced_chi2", _ONE, "Reduced chi-square of the wall fit."),
    ("cells.wall.n_points", "-", "Cells in the fit."),
    ("cells.wall.axis_deg", "deg", "Polar axis whose component reverses, atan2(y, x)."),
    ("cells.wall.normal_deg", "deg", "Wall normal, atan2(y, x)."),
    ("cells.wall.sigma_normal_deg", "deg", "Its uncertainty."),
    ("cells.wall.x_pm", "pm", "A point on the wall, x."),
    ("cells.wall.y_pm", "pm", "A point on the wall, y."),
    ("cells.wall.convention", "-", "The profile and width convention in words."),
    ("cells.wall.asymmetry", "pm", "|P+| - |P-| of the two plateaus (a built-in field shows as "
                                   "a difference), from a refit with an offset."),
    ("cells.wall.sigma_asymmetry", "pm", "Its uncertainty."),
    ("cells.wall.units", "-", "Units of the wall keys in words."),
    ("cells.wall.x0", "pm", "Deprecated: x0_pm."),
    ("cells.wall.sigma_x0", "pm", "Deprecated: sigma_x0_pm."),
    ("cells.wall.width", "pm", "Deprecated: width_pm."),
    ("cells.wall.sigma_width", "pm", "Deprecated: sigma_width_pm."),
    ("cells.wall.correlation_length", "pm", "Deprecated: correlation_length_pm."),
    ("cells.wall.width_80", "pm", "Deprecated: width_80_pm."),
    ("cells.wall.p0", "pm", "Deprecated: p0_pm."),
    ("cells.wall.sigma_p0", "pm", "Deprecated: sigma_p0_pm."),
    ("cells.wall_candidate", "-", "A wall fit that was rejected (same keys as cells.wall, plus "
                                  "rejected: why), or null."),
    ("cells.topology.*", "-", "Winding numbers of the displacement field: n_plaquettes, "
                              "total_winding, n_positive, n_negative, by_kind, min_snr, "
                              "convention, cores_truncated, and cores (each i, j, x_pm, y_pm, "
                              "winding, kind, chirality, circulation_pm2 and flux_pm2 in pm^2)."),
    ("cells.sign_conventions", "-", "Axes and angle conventions in words."),
    ("cells.notes", "-", "What was skipped and why."),
    ("cells.loop_cores.*", "-", "Cores of the loop-winding search the vortex rule uses (one "
                                "topology for the analysis and the rules)."),
    ("physics", "-", "Wall physics of the frame (docs/wall-physics.md), or its reason."),
    ("physics.reason", "-", "Why there is no wall physics in this frame."),
    ("physics.wall", "-", "The wall the physics is computed from (position, width, P0, "
                          "asymmetry, each with sigma; pm and C/m^2), or null."),
    ("physics.wall.*", "-", "Keys of the wall fit as in cells.wall, plus asymmetry (pm)."),
    ("physics.gl", "-", "Ginzburg-Landau numbers (correlation length m, gradient coefficient, "
                        "wall energy J/m^2, each with sigma) from the width and the material's "
                        "Landau coefficients, or null."),
    ("physics.gl.*", "-", "The entries of physics.gl, each with its unit in its name."),
    ("physics.gl_reason", "-", "Why there are no Ginzburg-Landau numbers."),
    ("physics.line.*", "-", "The wall's position per cell row: rows, u_pm (pm), sigma_u_pm "
                            "(pm), row_spacing_pm (pm)."),
    ("physics.roughness", "-", "Roughness exponent zeta from B(L) with its interval, or null."),
    ("physics.roughness.*", "-", "The entries of physics.roughness: zeta, its interval, the "
                                 "range of L fitted and B(L)."),
    ("physics.roughness_reason", "-", "Why there is no roughness exponent."),
    ("series", "-", "For the running average of a fast-scan series: key, members, depth, "
                    "frames left out and the registration residuals, or absent."),
    ("series.*", "-", "The entries of the series block (see series)."),
    ("scan_drift_correction.*", "-", "The in-frame drift that was undone (velocity nm/s, "
                                     "line time s, largest shift px) or why not."),
)

_FILES = {"columns.csv": COLUMNS, "cells.csv": CELLS, "summary.json": SUMMARY}


def _deprecated(file: str, name: str) -> str | None:
    if file == "cells.csv":
        base = name[len("sigma_"):] if name.startswith("sigma_") else name
        if base in RENAMED_CELL_FIELDS:
            new = RENAMED_CELL_FIELDS[base]
            return (f"sigma_{new}" if name.startswith("sigma_") else new)
    if file == "summary.json" and name.startswith("cells.wall."):
        key = name[len("cells.wall."):]
        if key in RENAMED_WALL_KEYS:
            return f"cells.wall.{RENAMED_WALL_KEYS[key]}"
    return None


def schema() -> dict:
    """The schema as a JSON-ready dict: ``{"version", "conventions", "files": {...}}``."""
    files = {}
    for file, fields in _FILES.items():
        rows = []
        for name, unit, definition in fields:
            row = {"name": name, "unit": unit, "definition": definition}
            new = _deprecated(file, name)
            if new:
                row["deprecated"] = f"renamed {new}; this name is removed in the next release"
            rows.append(row)
        files[file] = rows
    return {"version": SCHEMA_VERSION,
            "conventions": __doc__.split("\n\n")[2].replace("\n", " ").replace("``", ""),
            "files": files}


def field_names(file: str) -> list[str]:
    """Names documented for `file` (``columns.csv``, ``cells.csv`` or ``summary.json``)."""
    return [name for name, _, _ in _FILES[file]]


_TEXT: str | None = None


def schema_json() -> str:
    """The schema as JSON text (built once per process; written beside every frame)."""
    global _TEXT
    if _TEXT is None:
        _TEXT = json.dumps(schema(), indent=1) + "\n"
    return _TEXT


def markdown() -> str:
    """``docs/outputs.md``: the schema as a page."""
    s = schema()
    lines = ["# Output files", "",
             "<!-- generated by `python -m livequant.schema --markdown > docs/outputs.md`; "
             "edit livequant/schema.py, not this page -->", "",
             "Every frame gets a folder `FRAME_ID/` (under `--out DIR`, or `SESSION/frames/` "
             "in a session) with `columns.csv` (one row per atomic column), `cells.csv` (one "
             "row per unit cell), `summary.json` (the frame's findings) and `schema.json` "
             f"(this page as data, schema version {s['version']}).", "",
             s["conventions"], ""]
    titles = {"columns.csv": "columns.csv: one row per atomic column",
              "cells.csv": "cells.csv: one row per unit cell",
              "summary.json": "summary.json (dotted keys; `.*` is a mapping)"}
    for file, rows in s["files"].items():
        lines += [f"## {titles[file]}", "", "| field | unit | definition |", "|---|---|---|"]
        for r in rows:
            d = r["definition"] + (f" **Deprecated:** {r['deprecated']}." if "deprecated" in r
                                   else "")
            lines.append(f"| `{r['name']}` | {r['unit']} | {d.replace('|', '/')} |")
        lines.append("")
    return "\n".join(lines).rstrip("\n") + "\n"


if __name__ == "__main__":  # pragma: no cover - the docs page and the JSON on demand
    import sys

    sys.stdout.write(markdown() if "--markdown" in sys.argv[1:] else schema_json())
