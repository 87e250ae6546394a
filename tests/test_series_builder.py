"""Which frames form a series, and the builder that turns members into aggregates."""

import numpy as np
import pytest

from livequant.config import Settings
from livequant.frames import FrameMeta, frame_from_array
from livequant.pipeline import analyze_frame
from livequant.series import SeriesBuilder, aggregate_id, is_aggregate, series_key
from sim_instrument.quick import perovskite_engine


def test_series_key_from_sidecar_or_container_page():
    assert series_key(FrameMeta("f1", 10.0, series_id="run-7")) == "run-7"
    assert series_key(FrameMeta("stack.h5#12", 10.0)) == "stack.h5"
    assert series_key(FrameMeta("f1", 10.0)) is None
    agg = FrameMeta("run-7~avg004", 10.0, extra={"series_role": "aggregate"})
    assert is_aggregate(agg) and series_key(agg) is None
    assert aggregate_id("a/b c", "average", 4) == "a_b_c~avg004"
    assert aggregate_id("p", "orthogonal", 2) == "p~pair"


def test_pages_of_a_container_feed_one_series_and_give_an_analysable_average():
    """Four pages NAME#0..3 of one region (the ids a container reader gives): the
    builder averages them and the aggregate, analysed like a frame, carries the
    series block and the summed dose (dwell x 4)."""
    eng = perovskite_engine(dwell_time_us=2.0, drift_nm_per_s=(0.01, 0.01), seed=6)
    acqs = eng.acquire_series(4, (0.0, 0.0), 1.92, (192, 192))
    settings = Settings()
    builder = None
    steps = []
    for k, a in enumerate(acqs):
        meta = FrameMeta(frame_id=f"stack.mrc#{k}", pixel_size_pm=10.0, dwell_time_us=2.0,
                         acquired_at=a.sidecar["acquired_at"])
        frame = frame_from_array(a.pixels, meta)
        key = series_key(frame.meta)
        builder = builder or SeriesBuilder(key, settings)
        steps.append(builder.add(frame))
    assert [s.record.accepted for s in steps] == [True] * 4
    assert [s.aggregate is not None for s in steps] == [False, True, True, True]
    agg = steps[-1].aggregate
    assert agg.frame_id == "stack.mrc~avg004" and agg.meta.dwell_time_us == 8.0
    res = analyze_frame(agg, settings)
    summ = res.summary()
    assert summ["series"]["n_members"] == 4 and summ["series"]["members"][0] == "stack.mrc#0"
    single = analyze_frame(frame_from_array(acqs[0].pixels, FrameMeta("one", 10.0, 2.0)),
                           settings).summary()
    gain = single["median_sigma_position_pm"] / summ["median_sigma_position_pm"]
    assert gain == pytest.approx(2.0, rel=0.2)      # sqrt(4): the summed dose


def test_a_member_at_another_scan_rotation_is_refused_with_its_reason():
    eng = perovskite_engine(dwell_time_us=1.0, seed=2)
    a, b = eng.acquire_series(2, (0.0, 0.0), 1.28, (128, 128))
    builder = SeriesBuilder("s", Settings())
    builder.add(frame_from_array(a.pixels, FrameMeta("a", 10.0, 1.0)))
    step = builder.add(frame_from_array(b.pixels, FrameMeta("b", 10.0, 1.0,
                                                            scan_rotation_deg=45.0)))
    assert not step.record.accepted and step.record.reason == "rotation"
    step = builder.add(frame_from_array(np.asarray(b.pixels), FrameMeta("c", 12.0, 1.0)))
    assert step.record.reason == "pixel-size"
