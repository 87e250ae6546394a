"""Container files (HDF5/EMD 0.2, MRC 2014, multi-page TIFF), written by the reference
libraries themselves (h5py, mrcfile, tifffile), read back image by image."""

from __future__ import annotations

import json

import h5py
import mrcfile
import numpy as np
import pytest
import tifffile

from livequant.containers import (container_members, iter_frames, read_any, read_pixels,
                                  ref_name, split_ref)
from livequant.frames import FrameError
from tests.daemon._helpers import lattice_image

SHAPE = (64, 72)


def _images(n, seed=0):
    return np.stack([lattice_image(SHAPE, seed=seed + k) for k in range(n)])


def _emd_group(parent, name, data, dims):
    """An EMD 0.2 data group: `data`, `dim1..dimN` with name/units (emdatasets.com spec)."""
    g = parent.create_group(name)
    g.attrs["emd_group_type"] = 1
    g.create_dataset("data", data=data)
    for k, (dim_name, units, values) in enumerate(dims, start=1):
        d = g.create_dataset(f"dim{k}", data=np.asarray(values, dtype=float))
        d.attrs["name"] = dim_name
        d.attrs["units"] = units
    return g


def _write_emd(path, single, stack):
    with h5py.File(path, "w") as fh:
        fh.attrs["version_major"] = 0
        fh.attrs["version_minor"] = 2
        data = fh.create_group("data")
        # 0.02 nm steps written the EMD way ("[n_m]"): 20 pm pixels
        _emd_group(data, "survey", single, [("y", "[n_m]", [0.0, 0.02]),
                                            ("x", "[n_m]", [0.0, 0.02])])
        # a time series: dim1 is time, the stack axis
        _emd_group(data, "series", stack, [("t", "[s]", np.arange(stack.shape[0]) * 4.0),
                                           ("y", "[Å]", [0.0, 0.2]),
                                           ("x", "[Å]", [0.0, 0.2])])
        _emd_group(data, "diffraction", np.zeros((2, 2, 8, 8), np.uint16),
                   [("a", "", [0, 1]), ("b", "", [0, 1]), ("c", "", [0, 1]),
                    ("d", "", [0, 1])])
        fh.create_group("microscope").attrs["high_tension_kV"] = 300.0


def test_emd_groups_become_frames_with_pixel_size_from_dims(tmp_path):
    single, stack = _images(1)[0], _images(3, seed=10)
    path = tmp_path / "run.emd"
    _write_emd(path, single, stack)
    refs = container_members(path)
    assert refs == [f"{path}#/data/diffraction/data", f"{path}#/data/series/data[0]",
                    f"{path}#/data/series/data[1]", f"{path}#/data/series/data[2]",
                    f"{path}#/data/survey/data"]
    survey = read_any(refs[-1])
    assert survey.frame_id == "run#data.survey"
    np.testing.assert_array_equal(survey.pixels, single)
    assert survey.meta.pixel_size_pm == pytest.approx(20.0)  # 0.02 nm
    for k in range(3):
        f = read_any(refs[1 + k])
        assert f.frame_id == f"run#data.series#{k}"
        np.testing.assert_array_equal(f.pixels, stack[k])
        assert f.meta.pixel_size_pm == pytest.approx(20.0)  # 0.2 Angstrom
    with pytest.raises(FrameError) as exc:
        read_any(refs[0])
    assert exc.value.reason == "not-2d" and "/data/diffraction/data" in str(exc.value)


def test_plain_hdf5_stack_uses_defaults_and_needs_a_pixel_size(tmp_path):
    stack = _images(2, seed=20)
    path = tmp_path / "scan.h5"
    with h5py.File(path, "w") as fh:
        fh.create_dataset("images", data=stack)
        fh.create_dataset("stage_x_nm", data=np.arange(2.0))  # 1D: metadata, not an image
    refs = container_members(path)
    assert refs == [f"{path}#/images[0]", f"{path}#/images[1]"]
    f = read_any(refs[1], defaults={"pixel_size_pm": 31.5})
    np.testing.assert_array_equal(f.pixels, stack[1])
    assert f.frame_id == "scan#images#1" and f.meta.pixel_size_pm == 31.5
    with pytest.raises(FrameError) as exc:
        read_any(refs[0])
    assert exc.value.reason == "no-pixel-size"


def test_mrc_stack_sections_with_voxel_size_in_angstrom(tmp_path):
    stack = _images(3, seed=30).astype(np.float32)
    path = tmp_path / "tilt.mrcs"
    with mrcfile.new(path) as mrc:
        mrc.set_data(stack)
        mrc.set_image_stack()
        mrc.voxel_size = 0.25  # Angstrom -> 25 pm
    refs = container_members(path)
    assert refs == [f"{path}#{k}" for k in range(3)]
    for k, ref in enumerate(refs):
        f = read_any(ref)
        assert f.frame_id == f"tilt#{k}"
        np.testing.assert_array_equal(f.pixels, stack[k])
        np.testing.assert_array_equal(read_pixels(ref), stack[k])  # the report's reader
        assert f.meta.pixel_size_pm == pytest.approx(25.0)


def test_single_image_mrc_keeps_the_plain_id(tmp_path):
    path = tmp_path / "one.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(_images(1)[0].astype(np.int16))
        mrc.voxel_size = 0.2
    assert container_members(path) == [str(path)]
    f = read_any(path)
    assert f.frame_id == "one" and f.meta.pixel_size_pm == pytest.approx(20.0)


def test_mrc_non_square_pixels_is_a_clear_error(tmp_path):
    path = tmp_path / "skew.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(_images(1)[0].astype(np.float32))
        mrc.voxel_size = (0.2, 0.3, 1.0)
    with pytest.raises(FrameError) as exc:
        read_any(path)
    assert exc.value.reason == "non-square-pixels" and "skew.mrc" in str(exc.value)


def test_tiff_stack_pages_with_imagej_calibration(tmp_path):
    stack = _images(3, seed=40)
    path = tmp_path / "burst.tif"
    # ImageJ convention: X resolution is pixels per `unit`; 50 px/nm = 20 pm pixels
    tifffile.imwrite(path, stack, imagej=True, resolution=(50.0, 50.0),
                     metadata={"unit": "nm", "axes": "ZYX"})
    refs = container_members(path)
    assert refs == [f"{path}#{k}" for k in range(3)]
    for k, ref in enumerate(refs):
        f = read_any(ref)
        np.testing.assert_array_equal(f.pixels, stack[k])
        assert f.frame_id == f"burst#{k}"
        assert f.meta.pixel_size_pm == pytest.approx(20.0, rel=1e-6)
    with pytest.raises(FrameError) as exc:  # the whole stack is not one frame
        read_any(path)
    assert exc.value.reason == "not-2d"


def test_json_sidecar_overrides_container_metadata_and_names_the_frames(tmp_path):
    stack = _images(2, seed=50).astype(np.float32)
    path = tmp_path / "x.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(stack)
        mrc.voxel_size = 0.2
    (tmp_path / "x.json").write_text(json.dumps({"frame_id": "site7", "pixel_size_pm": 19.8,
                                                 "dwell_time_us": 4.0, "detector": "ABF"}))
    f = read_any(f"{path}#1")
    assert f.frame_id == "site7#1"
    assert f.meta.pixel_size_pm == 19.8 and f.meta.dwell_time_us == 4.0
    assert f.meta.detector == "ABF"


@pytest.mark.parametrize("name, writer", [
    ("cut.h5", lambda p: _write_emd(p, _images(1)[0], _images(2))),
    ("cut.mrc", lambda p: mrcfile.new(p, data=_images(2).astype(np.float32)).close()),
])
def test_damaged_container_is_listed_once_and_reads_as_unreadable(tmp_path, name, writer):
    path = tmp_path / name
    writer(path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 3])
    assert container_members(path) == [str(path)]
    with pytest.raises(FrameError) as exc:
        read_any(path, defaults={"pixel_size_pm": 20.0})
    assert exc.value.reason in {"unreadable", "no-images"} and name in str(exc.value)


def test_hash_in_file_name_and_iter_frames(tmp_path):
    stack = _images(2, seed=60)
    path = tmp_path / "run#2.tif"
    tifffile.imwrite(path, stack)
    assert split_ref(f"{path}#1") == (path, "1")
    assert split_ref(str(path)) == (path, None)
    assert ref_name(f"{path}#1") == "run#2.tif#1" and ref_name(path) == "run#2.tif"
    assert ref_name(f"{tmp_path}/gone.h5#/data/a/data") == "gone.h5#/data/a/data"
    got = list(iter_frames([path], defaults={"pixel_size_pm": 20.0}))
    assert [g.frame.frame_id for g in got] == ["run#2#0", "run#2#1"]
    assert all(g.error is None for g in got)
