import json
import os
import threading

import numpy as np
import pytest

from lensrec.suite_runner import SuiteCache, gaussian_field_task, run_suite

SETTINGS = {"seed": 7, "nside": 32, "lmax": 64, "nthreads": 1, "n_sims": 6}


def _arrays(run):
    return {i: run.cache.load(i) for i in run.cache.finished()}


def _same(a, b):
    assert sorted(a) == sorted(b)
    for i in a:
        for key in a[i]:
            np.testing.assert_array_equal(a[i][key], b[i][key])  # bit-identical: same stream, same arithmetic


def test_serial_processes_and_dask_give_bit_identical_results(tmp_path):
    serial = run_suite(SETTINGS, tmp_path / "serial", gaussian_field_task, progress=False)
    pool = run_suite(SETTINGS, tmp_path / "pool", gaussian_field_task, executor="processes", workers=2, progress=False)
    distributed = pytest.importorskip("distributed")
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=50
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        dask_run = run_suite(SETTINGS, tmp_path / "dask", gaussian_field_task, executor=client, progress=False)
    assert serial.computed == pool.computed == dask_run.computed == list(range(6))
    _same(_arrays(serial), _arrays(pool))
    _same(_arrays(serial), _arrays(dask_run))


def test_the_reference_task_has_the_input_spectrum(tmp_path):
    # the field is drawn with C_l = 1/(l+1)^2; the mean over m of |a_lm|^2 scatters by sqrt(2/(2l+1)) (common practice)
    run = run_suite(dict(SETTINGS, n_sims=1), tmp_path, gaussian_field_task, progress=False)
    power = run.cache.load(0)["power"]
    ell = np.arange(20, 65)
    ratio = power[ell] * (ell + 1.0) ** 2
    assert abs(ratio.mean() - 1) < 4 * np.sqrt(2.0 / np.sum(2 * ell + 1))  # 4 sigma of the pooled estimate


def test_interrupted_suite_resumes_to_the_same_answer(tmp_path):
    full = run_suite(SETTINGS, tmp_path / "full", gaussian_field_task, progress=False)
    cancel = threading.Event()
    seen = []

    def progress(done, total):
        seen.append(done)
        if done >= 3:
            cancel.set()

    part = run_suite(SETTINGS, tmp_path / "part", gaussian_field_task, progress=progress, cancel=cancel)
    assert part.cancelled and len(part.computed) == 3
    resumed = run_suite(SETTINGS, tmp_path / "part", gaussian_field_task, progress=False)
    assert resumed.reused == [0, 1, 2] and resumed.computed == [3, 4, 5]
    _same(_arrays(full), _arrays(resumed))


def test_a_crash_mid_write_leaves_no_file_that_looks_complete(tmp_path, monkeypatch):
    import lensrec.suite_runner as runner

    calls = {"n": 0}
    original = runner.np.savez

    def dying_savez(handle, **arrays):
        calls["n"] += 1
        if calls["n"] == 2:
            handle.write(b"PK\x03\x04 half")
            raise KeyboardInterrupt  # simulated Ctrl-C in the middle of writing sim 1
        return original(handle, **arrays)

    monkeypatch.setattr(runner.np, "savez", dying_savez)
    with pytest.raises(KeyboardInterrupt):
        run_suite(SETTINGS, tmp_path, gaussian_field_task, progress=False)
    monkeypatch.setattr(runner.np, "savez", original)
    assert sorted(os.listdir(tmp_path / "sims")) == ["sim_00000.npz"]
    resumed = run_suite(SETTINGS, tmp_path, gaussian_field_task, progress=False)
    assert resumed.reused == [0] and resumed.computed == [1, 2, 3, 4, 5]


def test_corrupted_cache_file_is_detected_reported_and_recomputed(tmp_path):
    first = run_suite(SETTINGS, tmp_path, gaussian_field_task, progress=False)
    good = first.cache.load(2)
    path = first.cache.path_of(2)
    with open(path, "r+b") as handle:
        handle.seek(200)
        handle.write(b"\x00garbage\x00")
    with pytest.raises(ValueError, match="checksum"):
        SuiteCache.open(tmp_path, SETTINGS, "lensrec.suite_runner:gaussian_field_task").load(2)
    with pytest.warns(RuntimeWarning, match="simulation 2 failed its checksum"):
        again = run_suite(SETTINGS, tmp_path, gaussian_field_task, progress=False)
    assert again.recomputed_corrupt == [2] and again.computed == [2]
    np.testing.assert_array_equal(again.cache.load(2)["map"], good["map"])


def test_results_from_other_settings_are_never_mixed(tmp_path):
    run_suite(SETTINGS, tmp_path, gaussian_field_task, progress=False)
    with pytest.raises(ValueError, match="differing: seed"):
        run_suite(dict(SETTINGS, seed=8), tmp_path, gaussian_field_task, progress=False)
    grown = run_suite(dict(SETTINGS, n_sims=8), tmp_path, gaussian_field_task, progress=False)
    assert grown.computed == [6, 7]  # more sims of the same suite are allowed
    manifest = json.loads((tmp_path / "manifest.json").read_text())
    assert len(manifest["entries"]) == 8


def test_bad_arguments_are_refused(tmp_path):
    with pytest.raises(ValueError, match="executor must be"):
        run_suite(SETTINGS, tmp_path, gaussian_field_task, executor="threads", progress=False)
    with pytest.raises(TypeError, match="top-level"):
        run_suite(SETTINGS, tmp_path / "b", lambda s, i: {"x": np.zeros(1)}, progress=False)
    with pytest.raises(ValueError, match="n_sims"):
        run_suite(dict(SETTINGS, n_sims=0), tmp_path / "c", gaussian_field_task, progress=False)
