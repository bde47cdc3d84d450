"""End to end through the command line: the demo, a track on the demo lane, and a batch track
task — result files checked against the simulator's truth, not hand-made result dicts."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest

from locate.workflows.demo_data import demo_dir
from tests.cli_helpers import run


@pytest.mark.slow
def test_tdoa_demo_writes_every_result_and_figure(tmp_path):
    out = tmp_path / "demo-out"
    code, stdout, err = run(["demo", out])
    assert code == 0, err
    for name in ("yard-fix.json", "yard-fix.csv", "yard-map.png", "yard-panels.png",
                 "yard-level.json", "yard-plan.png", "yard-plan.json", "lane-track.json",
                 "lane-map.png", "report.html", "lane-report.html"):
        assert (out / name).is_file() and (out / name).stat().st_size > 0, name
    fix = json.loads((out / "yard-fix.json").read_text())
    track = json.loads((out / "lane-track.json").read_text())
    assert fix["schema"] == track["schema"] == "tdoa-result/1"
    assert len(fix["fixes"]) >= 3 and track["kind"] == "track"
    assert "Demo results are in" in stdout


def test_tdoa_track_on_the_demo_lane_follows_the_van(tmp_path):
    site = demo_dir() / "lane.toml"
    out = tmp_path / "lane.json"
    code, _, err = run(["-q", "track", site, "--from", "1", "--to", "7.5", "--source-z", "0.8",
                        "--json", out])
    assert code == 0, err
    doc = json.loads(out.read_text())
    pts = doc["track"]["points"]
    assert len(pts) >= 5
    t = np.array([p["t_emit_s"] for p in pts])
    xy = np.array([p["position_m"][:2] for p in pts])
    # the van drives one straight line at constant speed (demo_recordings/regenerate.py):
    # check the track against a straight line fitted by numpy.polyfit (reference library)
    vx, x0 = np.polyfit(t, xy[:, 0], 1)
    vy, y0 = np.polyfit(t, xy[:, 1], 1)
    off = np.hypot(xy[:, 0] - (x0 + vx * t), xy[:, 1] - (y0 + vy * t))
    assert off.max() < 1.0
    speed = float(np.hypot(vx, vy))
    assert abs(speed - doc["track"]["speed_mps"]) < 0.5
    assert np.all(np.diff(t) > 0)


def test_a_batch_track_task_writes_the_same_track_as_the_command(tmp_path):
    shutil.copy(demo_dir() / "lane.toml", tmp_path / "lane.toml")
    shutil.copy(demo_dir() / "lane.flac", tmp_path / "lane.flac")
    (tmp_path / "jobs.toml").write_text("""
[defaults]
output_dir = "out"

[[task]]
name = "van"
site = "lane.toml"
command = "track"
from = 1.0
to = 7.5
[task.options]
source_z = 0.8
""")
    code, _, err = run(["-q", "batch", tmp_path / "jobs.toml", "--jobs", "1"])
    assert code == 0, err
    batch_doc = json.loads((tmp_path / "out" / "van.json").read_text())
    code, _, err = run(["-q", "track", tmp_path / "lane.toml", "--from", "1", "--to", "7.5",
                        "--source-z", "0.8", "--json", tmp_path / "direct.json"])
    assert code == 0, err
    direct = json.loads((tmp_path / "direct.json").read_text())
    a = np.array([p["position_m"] for p in batch_doc["track"]["points"]])
    b = np.array([p["position_m"] for p in direct["track"]["points"]])
    assert a.shape == b.shape and np.allclose(a, b, atol=1e-9)
    assert batch_doc["batch_task"]["name"] == "van"


@pytest.mark.slow
def test_tdoa_demo_runs_from_an_installed_wheel_in_an_empty_folder(tmp_path):
    # a pip user has no checkout: the demo must come with the package (package data)
    import subprocess
    import sys
    from pathlib import Path

    repo = Path(__file__).resolve().parents[2]
    wheels, target, empty = tmp_path / "wheels", tmp_path / "site", tmp_path / "empty"
    empty.mkdir()
    pip = [sys.executable, "-m", "pip", "-q", "--disable-pip-version-check"]
    subprocess.run(pip + ["wheel", "--no-deps", "-w", str(wheels),
                          str(repo)], check=True, capture_output=True)
    wheel = next(wheels.glob("*.whl"))
    subprocess.run(pip + ["install", "--no-deps", "--target", str(target), str(wheel)],
                   check=True, capture_output=True)
    env = {"PYTHONPATH": str(target), "PATH": "/usr/bin:/bin", "HOME": str(tmp_path),
           "MPLBACKEND": "Agg"}
    where = subprocess.run([sys.executable, "-c", "import locate; print(locate.__file__)"],
                           cwd=empty, env=env, capture_output=True, text=True, check=True)
    assert where.stdout.startswith(str(target))  # the installed copy, not the checkout
    res = subprocess.run([sys.executable, "-m", "locate", "-q", "demo", "out"], cwd=empty,
                         env=env, capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    assert (empty / "out" / "yard-fix.json").is_file()
    assert (empty / "out" / "report.html").is_file()
