"""A deployment scanned in time chunks (locate.workflows.chunked): in process and on Dask.

Reference: the same scan run in one piece (``tdoa fix SITE``), and the simulator's truth of the
invented scene of tests/deployment_scene.py (8 bangs over 6 minutes).  The Dask tests start a
scheduler and worker processes on 127.0.0.1 only.
"""

from __future__ import annotations

import json
import os
import threading

import numpy as np
import pytest

from locate.io.audio import open_recordings
from locate.io.site import load_site
from locate.workflows.chunked import plan_chunks
from tests.deployment_scene import plan_files, write_deployment
from tests.field_scene import run_cli

FS = 8000


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    from tests.cli.test_deployment import _scene_times

    folder = tmp_path_factory.mktemp("chunked")
    starts, plan = plan_files(fs=FS)
    rng = np.random.default_rng(3)
    pos = np.c_[rng.uniform(5, 55, 8), rng.uniform(5, 55, 8), np.ones(8)]
    times = _scene_times(starts, plan, pos)
    # one more bang whose first arrival is 20 ms after a 120 s chunk edge, heard in both
    # neighbours' scans; the chunk that owns its onset keeps it
    extra = np.array([[30.0, 30.0, 1.0]])
    edge_t = 240.0 + 0.02 - np.min(np.linalg.norm(
        np.array([[0.0, 0.0, 1.5], [58.0, 6.0, 1.3], [62.0, 55.0, 1.8], [4.0, 60.0, 1.4],
                  [30.0, 28.0, 2.4]]) - extra[0], axis=1)) / 336.6
    times = np.r_[times, edge_t]
    pos = np.r_[pos, extra]
    order = np.argsort(times)
    sc = write_deployment(folder, fs=FS, bang_times_s=times[order], positions_m=pos[order],
                          drop=((2, 3),), bang_pa=2.0)
    code, out, err = run_cli(["fix", sc.site, "--source-z", "1.0", "--json",
                              folder / "whole.json"])
    assert code == 0, err
    return sc, json.loads((folder / "whole.json").read_text())


def _same(a, b):
    assert len(a["fixes"]) == len(b["fixes"])
    for x, y in zip(a["fixes"], b["fixes"]):
        assert abs(x["t_s"] - y["t_s"]) < 1e-9  # float rounding of the scan start only
        assert x["t_utc"] == y["t_utc"]
        # the same fix: the event detector whitens each block against its own background, so
        # a chunk's per-mic onsets (and the gated delays) may move by a sample; the positions
        # then agree to a quarter of the 95 % ellipse (they agreed to 1e-9 m before whitening)
        tol = 0.25 * x["ellipse95"]["semi_major_m"] + 1e-6
        assert np.linalg.norm(np.subtract(x["position_m"], y["position_m"])) <= tol
        assert x.get("absent_mics") == y.get("absent_mics")


def test_chunks_start_on_the_background_grid_and_own_the_axis_once(scene):
    sc, _ = scene
    rec = open_recordings(load_site(sc.site))
    chunks = plan_chunks(rec.start_s, rec.stop_s, FS, 100.0, 12.0)
    seg = 5.0  # 1000 frames of 40 samples at 8 kHz (EventStream: background_s = 5 s)
    for c in chunks:
        assert ((c.scan_s[0] - rec.start_s) / seg) == pytest.approx(
            round((c.scan_s[0] - rec.start_s) / seg), abs=1e-9)
    owns = [c.own_s for c in chunks]
    assert owns[0][0] == -np.inf and owns[-1][1] == np.inf
    assert all(owns[k][1] == owns[k + 1][0] for k in range(len(owns) - 1))
    assert chunks[1].scan_s[0] == pytest.approx(chunks[1].own_s[0] - 15.0)  # 12 s -> 3 segs


def test_chunked_run_equals_the_whole_run(scene):
    sc, whole = scene
    assert len(whole["fixes"]) == 9
    code, out, err = run_cli(["fix", sc.site, "--source-z", "1.0", "--chunk", "120",
                              "--json", sc.folder / "chunked.json"])
    assert code == 0, err
    chunked = json.loads((sc.folder / "chunked.json").read_text())
    assert chunked["chunks"]["count"] == 4
    _same(whole, chunked)


def test_chunk_options_are_checked(scene):
    sc, _ = scene
    code, out, err = run_cli(["fix", sc.site, "--chunk", "120", "--chunk-overlap", "4"])
    assert code == 2 and "--chunk-overlap" in err
    code, out, err = run_cli(["fix", sc.site, "--scheduler", "tcp://127.0.0.1:1"])
    assert code == 2 and "--scheduler" in err and "--chunk" in err


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None,
                                  silence_logs=40) as c:
        yield c


@pytest.mark.slow
def test_dask_run_equals_the_whole_run_even_when_a_worker_dies(scene, cluster):
    from distributed import Client

    from locate.workflows.chunked import locate_chunked

    sc, whole = scene
    site = load_site(sc.site)
    rec = open_recordings(site)
    killed = []

    with Client(cluster.scheduler_address) as client:
        pids = client.run(os.getpid)

    def kill_one(_n):
        if not killed:  # after the first chunk: kill a worker that may hold others
            pid = sorted(pids.values())[0]
            killed.append(pid)
            threading.Thread(target=os.kill, args=(pid, 9)).start()

    result = locate_chunked(site, rec, chunk_s=60.0, scheduler=cluster.scheduler_address,
                            progress=kill_one, source_z_m=1.0)
    assert killed
    assert result["chunks"]["count"] == 8
    _same(whole, result)
