"""The Cells contract used by livequant.outputs and livequant.pipeline, and degenerate inputs."""

from __future__ import annotations

import json

import numpy as np
import pytest

from livequant.analysis.cells import DESCRIPTORS, Cells, compute_cells
from livequant.analysis.polarization import MaterialConstants
from livequant.analysis.types import Columns
from tests.analysis.test_cells_synthetic import lattice_for, make_columns, perovskite

PX = 10.0


def _cells(**kw):
    sites = perovskite(6, 5, oxygen=True, b_shift=lambda r: np.tile([0.3, -0.2], (len(r), 1)))
    cols = make_columns(sites, sigma_px=0.05, rng=np.random.default_rng(0))
    return compute_cells(cols, lattice_for(), pixel_size_pm=PX, **kw)


def test_csv_fields_follow_the_contract():
    cells = _cells()
    fields = cells.csv_fields()
    assert fields[:4] == ["i", "j", "x_pm", "y_pm"]
    for name, has_sigma, _ in DESCRIPTORS:
        k = fields.index(name)
        if has_sigma:
            assert fields[k + 1] == "sigma_" + name
        else:
            assert "sigma_" + name not in fields
    assert len(fields) == len(set(fields))


def test_csv_rows_match_the_arrays():
    cells = _cells()
    rows = cells.csv_rows()
    assert len(rows) == len(cells) == 5 * 4
    assert all(list(r) == cells.csv_fields() for r in rows)
    k = 7
    assert int(rows[k]["i"]) == cells.i[k] and int(rows[k]["j"]) == cells.j[k]
    assert float(rows[k]["x_pm"]) == pytest.approx(cells.x_pm[k], abs=1e-3)
    assert float(rows[k]["dx_pm"]) == pytest.approx(cells.dx_pm[k], rel=1e-5)
    assert rows[k]["gpa_exx"] == "nan"  # no image given: not available, written as nan
    # x = image column, y = image row at the file boundary: B shifted by (row 0.3, col -0.2) px
    assert np.median(cells.dx_pm) == pytest.approx(-2.0, abs=0.3)
    assert np.median(cells.dy_pm) == pytest.approx(3.0, abs=0.3)


def test_summary_is_strict_json():
    mat = MaterialConstants("PbTiO3", 389.87, 413.80, born_b=6.71, p_sign_b_vs_a=-1)
    for kw in ({}, {"material": mat}, {"detector": "ABF"}):
        summary = _cells(**kw).summary()
        text = json.dumps(summary, allow_nan=False)  # NaN is not JSON: must not appear
        back = json.loads(text)
        assert back["n_cells"] == 20
        assert {"descriptors", "local_lattice", "reference", "polarization", "wall",
                "topology", "tilt", "gpa"} <= set(back)
        assert back["descriptors"]["a_pm"]["n"] == 20


def test_values_are_read_only_and_attributes_resolve():
    cells = _cells()
    with pytest.raises(ValueError):
        cells.dx_pm[0] = 1.0
    assert cells.sigma_exx is cells.values["sigma_exx"]
    with pytest.raises(AttributeError, match="no_such_descriptor"):
        _ = cells.no_such_descriptor


def _empty_columns():
    z2, z1 = np.zeros((0, 2)), np.zeros(0)
    return Columns(positions_px=z2, sigma_positions_px=z2, amplitude=z1, sigma_amplitude=z1,
                   width_px=z2, width_angle_deg=z1, background=z1,
                   sublattice=np.zeros(0, dtype="<U2"), ij=np.zeros((0, 2), int),
                   converged=np.zeros(0, bool), reduced_chi2=z1)


@pytest.mark.parametrize("case", ["empty", "single column", "only B", "unconverged"])
def test_degenerate_inputs_give_empty_cells_not_errors(case):
    if case == "empty":
        cols = _empty_columns()
    else:
        cols = make_columns(perovskite(3, 3))
        if case == "single column":
            cols = cols.select(np.arange(len(cols)) == 0)
        elif case == "only B":
            cols = cols.of("B")
        else:
            cols = Columns(**{**{k: getattr(cols, k) for k in (
                "positions_px", "sigma_positions_px", "amplitude", "sigma_amplitude", "width_px",
                "width_angle_deg", "background", "sublattice", "ij", "reduced_chi2")},
                "converged": np.zeros(len(cols), bool)})
    cells = compute_cells(cols, lattice_for(), pixel_size_pm=PX, image=np.ones((64, 64)))
    assert len(cells) == 0
    assert cells.csv_rows() == []
    summary = json.loads(json.dumps(cells.summary(), allow_nan=False))
    assert summary["n_cells"] == 0 and summary["wall"] is None
    assert "no complete cell" in " ".join(summary["notes"])


def test_duplicate_index_keeps_the_better_fit():
    sites = perovskite(3, 3)
    cols = make_columns(sites)
    # A second, worse claimant of A(1, 1), 3 px away: it must not replace the good column.
    k = np.flatnonzero((cols.sublattice == "A") & (cols.ij[:, 0] == 1) & (cols.ij[:, 1] == 1))[0]
    pos = np.vstack([cols.positions_px, cols.positions_px[k] + 3.0])
    sig = np.vstack([cols.sigma_positions_px, [[0.5, 0.5]]])
    extra = {name: np.concatenate([getattr(cols, name), getattr(cols, name)[k:k + 1]])
             for name in ("amplitude", "sigma_amplitude", "width_px", "width_angle_deg",
                          "background", "sublattice", "ij", "converged", "reduced_chi2")}
    dup = Columns(positions_px=pos, sigma_positions_px=sig, **extra)
    a = compute_cells(cols, lattice_for(), pixel_size_pm=PX)
    b = compute_cells(dup, lattice_for(), pixel_size_pm=PX)
    np.testing.assert_allclose(a.a_pm, b.a_pm)


def test_bad_inputs_are_named():
    cols = make_columns(perovskite(3, 3))
    with pytest.raises(TypeError, match="`columns`"):
        compute_cells({"positions_px": []}, lattice_for(), pixel_size_pm=PX)
    with pytest.raises(TypeError, match="`lattice`"):
        compute_cells(cols, np.eye(2), pixel_size_pm=PX)
    with pytest.raises(ValueError, match="`pixel_size_pm`"):
        compute_cells(cols, lattice_for(), pixel_size_pm=float("nan"))
    with pytest.raises(ValueError, match="a_pm"):
        MaterialConstants("X", -1.0, 390.0)
    with pytest.raises(ValueError, match="missing"):
        MaterialConstants.from_object({"name": "X", "a_pm": 390.0})


def test_cells_is_a_frozen_dataclass():
    cells = _cells()
    assert isinstance(cells, Cells)
    with pytest.raises(AttributeError):
        cells.i = np.zeros(3)


def test_cells_pickle_round_trip():
    # FrameResult crosses process boundaries in the daemon's worker pool.
    import pickle

    cells = _cells(detector="ABF")
    back = pickle.loads(pickle.dumps(cells))
    assert back.csv_fields() == cells.csv_fields()
    np.testing.assert_array_equal(back.tilt_deg, cells.tilt_deg)
    assert back.summary() == cells.summary()
