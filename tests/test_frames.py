"""Frame readers and the sidecar: each invalid input has its own clear message."""

import json
import os

import numpy as np
import pytest
import tifffile

from livequant.frames import FrameError, read_frame, write_frame
from livequant.wire import decode_frame_message, encode_frame_message

GOOD = np.arange(64 * 64, dtype=np.uint16).reshape(64, 64)


def _sidecar(path, data):
    path.with_suffix(".json").write_text(data if isinstance(data, str) else json.dumps(data))


def test_tiff_and_npy_with_sidecar(tmp_path):
    p = write_frame(tmp_path, "f1", GOOD, {"pixel_size_pm": 9.5, "detector": "ABF",
                                            "stage_x_nm": 12.5, "operator_note": "kept"})
    f = read_frame(p)
    assert f.frame_id == "f1" and f.meta.pixel_size_pm == 9.5 and f.meta.detector == "ABF"
    assert f.meta.extra == {"operator_note": "kept"}      # unknown keys kept (DESIGN.md)
    assert not f.pixels.flags.writeable
    np.testing.assert_array_equal(f.pixels, GOOD)
    q = write_frame(tmp_path, "f2", GOOD.astype(np.float32), None, fmt="npy")
    g = read_frame(q, defaults={"pixel_size_pm": 7.0})
    assert g.meta.pixel_size_pm == 7.0 and g.frame_id == "f2"


def test_sidecar_overrides_defaults_and_frame_id(tmp_path):
    p = write_frame(tmp_path, "x", GOOD, {"frame_id": "scan-0042", "pixel_size_pm": 8.0})
    f = read_frame(p, defaults={"pixel_size_pm": 99.0, "detector": "HAADF"})
    assert f.frame_id == "scan-0042" and f.meta.pixel_size_pm == 8.0 and f.meta.detector == "HAADF"


def _write_tiff(path, array):
    tifffile.imwrite(path, array, photometric="minisblack")
    return path


BAD_CASES = {
    "empty-file": lambda p: p.write_bytes(b""),
    "truncated": lambda p: (np.save(p, GOOD), p.write_bytes(p.read_bytes()[:-100])),
    "unreadable": lambda p: p.write_bytes(b"\x93NUMPY this is not an array header"),
    "not-2d": lambda p: np.save(p, np.zeros((3, 16, 16))),
    "non-finite": lambda p: np.save(p, np.where(GOOD > 100, np.nan, 1.0)),
    "bad-dtype": lambda p: np.save(p, GOOD.astype(np.complex64)),
    "too-small": lambda p: np.save(p, np.zeros((4, 4))),
}


@pytest.mark.parametrize("reason", sorted(BAD_CASES))
def test_each_bad_npy_has_its_reason(tmp_path, reason):
    p = tmp_path / "bad.npy"
    BAD_CASES[reason](p)
    _sidecar(p, {"pixel_size_pm": 10.0})
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == reason
    assert "bad.npy" in str(exc.value)


def test_truncated_tiff(tmp_path):
    p = _write_tiff(tmp_path / "t.tif", GOOD)
    p.write_bytes(p.read_bytes()[: len(p.read_bytes()) // 2])
    _sidecar(p, {"pixel_size_pm": 10.0})
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason in ("unreadable", "truncated") and "t.tif" in str(exc.value)


def test_not_an_image(tmp_path):
    p = tmp_path / "notes.tif"
    p.write_text("these are the operator's notes, not an image")
    with pytest.raises(FrameError, match="notes.tif") as exc:
        read_frame(p)
    assert exc.value.reason == "unreadable"


def test_tiff_stack_is_refused(tmp_path):
    p = _write_tiff(tmp_path / "stack.tif", np.zeros((3, 32, 32), np.uint16))
    _sidecar(p, {"pixel_size_pm": 10.0})
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == "not-2d"


def test_absurd_declared_size_is_refused_before_reading(tmp_path):
    p = tmp_path / "huge.npy"
    header = np.lib.format.header_data_from_array_1_0(np.zeros((2, 2), np.uint16))
    header["shape"] = (200000, 200000)
    with open(p, "wb") as fh:
        np.lib.format.write_array_header_1_0(fh, header)
        fh.write(b"\0" * 64)
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == "too-large"


@pytest.mark.parametrize("sidecar,reason,fragment", [
    ("{not json", "sidecar-not-json", "not valid JSON"),
    ("[1, 2]", "sidecar-not-object", "JSON object"),
    ({"pixel_size_pm": -3}, "sidecar-invalid", "pixel_size_pm"),
    ({"pixel_size_pm": "ten"}, "sidecar-invalid", "pixel_size_pm"),
    ({"pixel_size_pm": 10, "dwell_time_us": True}, "sidecar-invalid", "dwell_time_us"),
    ({"pixel_size_pm": 10, "frame_id": 7}, "sidecar-invalid", "frame_id"),
    ({"pixel_size_pm": 10, "acquired_at": "yesterday"}, "sidecar-invalid", "acquired_at"),
    ({"detector": "HAADF"}, "no-pixel-size", "pixel_size_pm"),
])
def test_each_bad_sidecar_has_its_reason(tmp_path, sidecar, reason, fragment):
    p = write_frame(tmp_path, "f", GOOD, None)
    _sidecar(p, sidecar)
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == reason
    msg = str(exc.value)
    assert fragment in msg and ("f.json" in msg or "f.tif" in msg), msg


def test_vanished_file(tmp_path):
    p = tmp_path / "gone.tif"
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == "vanished"


def test_unsupported_suffix(tmp_path):
    p = tmp_path / "frame.png"
    p.write_bytes(b"\x89PNG")
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == "unsupported-format"


def test_writer_leaves_no_partial_files(tmp_path):
    write_frame(tmp_path, "a", GOOD, {"pixel_size_pm": 1.0})
    assert sorted(os.listdir(tmp_path)) == ["a.json", "a.tif"]


def test_socket_message_round_trip_and_rejections():
    parts = encode_frame_message(GOOD, {"frame_id": "s1", "pixel_size_pm": 9.0})
    pixels, sc = decode_frame_message(parts)
    np.testing.assert_array_equal(pixels, GOOD)
    assert sc.frame_id == "s1" and sc.pixel_size_pm == 9.0
    bad = [
        ([b"frame", parts[1]], "bad-message"),
        ([b"other", parts[1], parts[2]], "bad-message"),
        ([b"frame", b"{oops", parts[2]], "bad-message"),
        ([b"frame", parts[1], parts[2][:-2]], "truncated"),
        ([b"frame", json.dumps({"dtype": "<u2", "shape": [64]}).encode(), parts[2]], "not-2d"),
        ([b"frame", json.dumps({"dtype": "|O", "shape": [64, 64]}).encode(), parts[2]], "bad-dtype"),
        ([b"frame", json.dumps({"dtype": "<u2", "shape": [10**6, 10**6]}).encode(), b""],
         "too-large"),
        ([b"frame", json.dumps({"dtype": "<u2", "shape": [64, 64], "pixel_size_pm": -1}).encode(),
          parts[2]], "sidecar-invalid"),
    ]
    for msg, reason in bad:
        with pytest.raises(FrameError) as exc:
            decode_frame_message(msg)
        assert exc.value.reason == reason, (msg[:2], exc.value)


# ---------------------------------------------------------------- reliability additions


@pytest.mark.parametrize("value, dtype", [(0, np.uint16), (1234.5, np.float32), (7, np.int8)])
def test_constant_frame_is_refused_after_its_metadata(tmp_path, value, dtype):
    """A frame of one value everywhere (blanked beam, detector not read out) is bad data,
    refused with its own reason; a missing pixel size is still reported first."""
    p = write_frame(tmp_path, "flat", np.full((64, 64), value, dtype), {"pixel_size_pm": 10.0})
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == "constant" and "flat.tif" in str(exc.value)
    assert repr(np.asarray(value, dtype).item()) in str(exc.value)
    q = write_frame(tmp_path, "flat_nopx", np.zeros((64, 64), np.uint16), None)
    with pytest.raises(FrameError) as exc:
        read_frame(q)
    assert exc.value.reason == "no-pixel-size"
    one_pixel_differs = np.zeros((64, 64), np.uint16)
    one_pixel_differs[63, 63] = 1
    r = write_frame(tmp_path, "almost", one_pixel_differs, {"pixel_size_pm": 10.0})
    assert read_frame(r).frame_id == "almost"


def test_link_out_of_the_folder_is_refused_before_reading(tmp_path):
    outside, watched = tmp_path / "private", tmp_path / "watched"
    watched.mkdir()
    target = write_frame(outside, "secret", GOOD, {"pixel_size_pm": 10.0})
    (watched / "innocent.tif").symlink_to(target)
    with pytest.raises(FrameError) as exc:
        read_frame(watched / "innocent.tif", confine_to=watched)
    assert exc.value.reason == "outside-folder"
    assert "innocent.tif" in str(exc.value) and str(outside) in str(exc.value)
    # the sidecar is confined too: its values would otherwise reach the ledger and events
    write_frame(watched, "mine", GOOD, None)
    (watched / "mine.json").symlink_to(outside / "secret.json")
    with pytest.raises(FrameError) as exc:
        read_frame(watched / "mine.tif", confine_to=watched)
    assert exc.value.reason == "outside-folder" and "sidecar" in str(exc.value)
    # a link that stays inside the folder is fine, and without confinement links are followed
    write_frame(watched, "real", GOOD, {"pixel_size_pm": 10.0})
    (watched / "alias.tif").symlink_to(watched / "real.tif")
    (watched / "alias.json").symlink_to(watched / "real.json")
    assert read_frame(watched / "alias.tif", confine_to=watched).meta.pixel_size_pm == 10.0
    assert read_frame(watched / "innocent.tif", defaults={"pixel_size_pm": 9.0}).frame_id \
        == "innocent"


def test_pipe_named_like_a_frame_or_sidecar_is_refused_not_waited_on(tmp_path):
    os.mkfifo(tmp_path / "pipe.tif")
    with pytest.raises(FrameError) as exc:
        read_frame(tmp_path / "pipe.tif")
    assert exc.value.reason == "not-a-file"
    p = write_frame(tmp_path, "f", GOOD, None)
    os.mkfifo(tmp_path / "f.json")
    with pytest.raises(FrameError) as exc:
        read_frame(p)
    assert exc.value.reason == "not-a-file" and "sidecar" in str(exc.value)


def test_failed_json_write_leaves_no_temporary_file(tmp_path, monkeypatch):
    import errno

    from livequant.frames import write_json_atomic

    write_json_atomic(tmp_path / "s.json", {"v": 1})

    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)
    with pytest.raises(OSError, match="No space"):
        write_json_atomic(tmp_path / "s.json", {"v": 2})
    assert sorted(os.listdir(tmp_path)) == ["s.json"]
    assert json.loads((tmp_path / "s.json").read_text()) == {"v": 1}  # old file untouched
