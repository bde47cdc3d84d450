"""tdoa batch: a manifest of tasks on a local pool or a Dask cluster, resumable."""

import json
from pathlib import Path

import numpy as np
import pytest

from locate.synth import Emission, Waveform, simulate_events
from locate.workflows import batch as batch_mod
from tests.cli_helpers import run, write_site
from tests.scenes import ARRAY_40M

RATE_HZ = 16000.0
SOURCES = {"north": np.array([30.0, 60.0, 1.0]), "east": np.array([75.0, 15.0, 1.0])}


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    """Two invented sites with one burst each, a corrupt one and a manifest of four tasks."""
    root = tmp_path_factory.mktemp("survey")
    wf = Waveform(kind="noise", band_hz=(200.0, 3000.0), duration_s=0.3)
    for k, (name, src) in enumerate(SOURCES.items()):
        sim = simulate_events(ARRAY_40M, [Emission(src, 1.0, wf)], sample_rate_hz=RATE_HZ,
                              duration_s=3.0, snr_db=25.0, rng=np.random.default_rng(k),
                              temperature_c=12.0, relative_humidity=70.0)  # as write_site
        (root / name).mkdir()
        write_site(root / name, ARRAY_40M, sim.signals, RATE_HZ)
    (root / "bad").mkdir()
    write_site(root / "bad", ARRAY_40M, np.ones((5, 100)), RATE_HZ)
    (root / "bad" / "rec.wav").write_bytes(b"RIFF\x00\x00\x00\x00WAVEfmt garbage" * 20)
    (root / "jobs.toml").write_text("""
[defaults]
output_dir = "out"

[[task]]
name = "north-burst"
site = "north/site.toml"
command = "fix"

[[task]]
name = "north-events"
site = "north/site.toml"
command = "events"
from = 0.5
to = 2.5

[[task]]
name = "broken"
site = "bad/site.toml"
command = "fix"
from = 0.0
to = 1.0

[[task]]
name = "east-span"
site = "east/site.toml"
command = "fix"
from = 0.9
to = 2.2
options = { band = "200:3000", no_reject = true }
""")
    return root


def _results(folder):
    return {p.name: json.loads(p.read_text()) for p in sorted(Path(folder).glob("*.json"))
            if p.name != "batch-summary.json"}


def _summary(path):
    doc = json.loads(Path(path).read_text())
    return [{k: v for k, v in r.items() if k != "output"} for r in doc["tasks"]]


def test_failed_task_is_reported_with_site_and_span_and_the_others_finish(survey):
    # common practice for batch runners: one bad input must not stop the others
    code, out, err = run(["batch", survey / "jobs.toml", "--jobs", "2"])
    assert code == 1
    assert "broken (fix, site.toml, 0-1 s) failed" in err
    assert "rec.wav" in err  # the message names the corrupt file
    summary = _summary(survey / "out" / "batch-summary.json")
    assert [r["status"] for r in summary] == ["ok", "ok", "failed", "ok"]
    res = _results(survey / "out")
    assert sorted(res) == ["east-span.json", "north-burst.json", "north-events.json"]
    # the fixes land on the simulated sources (exact simulator): within 0.5 m
    for name, key in (("north-burst.json", "north"), ("east-span.json", "east")):
        pos = np.array(res[name]["fixes"][0]["position_m"][:2])
        assert np.linalg.norm(pos - SOURCES[key][:2]) < 0.5
    assert res["north-events.json"]["events"][0]["n_mics"] == 5


def test_resume_reruns_nothing_that_finished(survey, monkeypatch):
    run(["batch", survey / "jobs.toml", "--jobs", "1"])
    stamps = {p: p.stat().st_mtime_ns for p in (survey / "out").glob("*.json")
              if p.name != "batch-summary.json"}
    calls = []
    real = batch_mod.run_task
    monkeypatch.setattr(batch_mod, "run_task", lambda t, r: calls.append(t.name) or real(t, r))
    code, out, err = run(["batch", survey / "jobs.toml", "--jobs", "1", "--resume"])
    assert code == 1 and calls == ["broken"]  # only the failed task runs again
    assert {p: p.stat().st_mtime_ns for p in stamps} == stamps
    assert [r["status"] for r in _summary(survey / "out" / "batch-summary.json")] == [
        "skipped", "skipped", "failed", "skipped"]


def test_local_pool_and_dask_cluster_give_identical_results(survey, tmp_path):
    distributed = pytest.importorskip(
        "distributed", reason="Dask distributed not installed (extra tdoa-locate[cluster])")
    local = tmp_path / "local.json"
    code, _, _ = run(["batch", survey / "jobs.toml", "--jobs", "2", "--summary", local])
    assert code == 1
    first = _results(survey / "out")
    for p in (survey / "out").glob("*.json"):
        p.unlink()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        remote = tmp_path / "dask.json"
        code, _, err = run(["batch", survey / "jobs.toml", "--scheduler",
                            cluster.scheduler_address, "--summary", remote])
    assert code == 1, err
    assert _results(survey / "out") == first
    assert _summary(remote) == _summary(local)
