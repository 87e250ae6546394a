"""``livequant bench``: what it measures and reports (never *how fast*: no timed
assertions on a shared machine), and the thread helpers for worker processes."""

import json

import numba
import pytest

from livequant.cli import main
from livequant.commands.bench import run_benchmarks
from livequant.pipeline import limit_threads, threads_per_worker


@pytest.fixture(scope="module")
def quick_result():
    return run_benchmarks(quick=True, reference_columns=8, rounds=1)


def test_bench_reports_ratio_against_the_same_fits(quick_result):
    r = quick_result["refinement"]
    assert r["frame_shape"] == [1024, 1024] and r["threads"] >= 1
    # the reference fitted every column it was given; the batched fit converged on nearly all
    assert r["curve_fit_fitted"] == r["curve_fit_columns"] == 8
    assert r["batched_converged"] >= 0.99 * r["columns"]
    # one round: the medians are that round's numbers, and the ratio is their quotient
    assert r["ratio"] == pytest.approx(r["batched_columns_per_s"] / r["curve_fit_columns_per_s"])
    assert r["ratio_per_round"] == [pytest.approx(r["ratio"])]
    assert r["ratio_vs_numeric_jacobian"] == pytest.approx(
        r["batched_columns_per_s"] / r["curve_fit_numeric_jacobian_columns_per_s"])


def test_bench_reports_stage_split_and_acquisition_fraction(quick_result):
    p, physics = quick_result["pipeline"]
    assert p["shape"] == [1024, 1024] and p["n_columns"] > 2000
    # the physics-like frame: PbTiO3 at 16 pm pixels holds ~1600 cells in 1024 x 1024
    assert physics["shape"] == [1024, 1024] and physics["n_columns"] > 3000
    assert "physics-like" in physics["frame"] and "Gaussian" in p["frame"]
    assert p["acquisition_s"] == pytest.approx(1024 * 1024 * 2e-6)   # T = Ny Nx t_px
    assert p["fraction_of_acquisition"] == pytest.approx(p["seconds"] / p["acquisition_s"])
    stages = p["stage_seconds"]
    assert {"lattice", "detect", "sublattice", "refine", "cells", "total"} <= set(stages)
    assert stages["total"] == pytest.approx(sum(v for k, v in stages.items() if k != "total"))
    assert p["peak_memory_frames"] > 0
    json.dumps(quick_result)   # --json must be able to print it


def test_bench_rejects_zero_rounds(capsys):
    assert main(["bench", "--rounds", "0"]) == 2
    assert "--rounds" in capsys.readouterr().err


def test_threads_per_worker_divides_the_cores():
    assert threads_per_worker(2, n_cores=2) == 1
    assert threads_per_worker(1, n_cores=2) == 2
    assert threads_per_worker(3, n_cores=2) == 1
    assert threads_per_worker(2, n_cores=8) == 4
    with pytest.raises(ValueError, match="`n_workers`"):
        threads_per_worker(0)


def test_limit_threads_sets_numba_threads():
    before = numba.get_num_threads()
    try:
        assert limit_threads(1) == 1 and numba.get_num_threads() == 1
        assert limit_threads(10_000) == numba.config.NUMBA_NUM_THREADS
        with pytest.raises(ValueError, match="`n_threads`"):
            limit_threads(0)
    finally:
        numba.set_num_threads(before)


def test_bench_reports_cpu_time_ratio(quick_result):
    r = quick_result["refinement"]
    # per CPU-second the batched fit cannot gain from threads: it is the per-core ratio
    assert r["ratio_cpu_time"] > 0
    assert len(r["load_average"]) == 2
