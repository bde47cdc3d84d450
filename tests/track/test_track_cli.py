"""``tdoa track`` end to end on simulated passes (issue 16 acceptance).

Every scene is written as an invented site file and a multichannel WAV (tests.cli_helpers) from
the project simulator (locate.synth.simulate_moving: exact retarded time per sample per mic), and
tracked through the command line.  Truth is the simulator's path at each point's emission time;
coverage uses the 95 % point of chi-square with 2 dof (scipy.stats.chi2.ppf(0.95, 2) = 5.991).
The air in the site file (20 degC, 50 % RH) is the simulator's default air, so the sound speed
is the same on both sides.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from locate import synth
from tests.cli_helpers import run, write_site

CHI2_95_2D = stats.chi2.ppf(0.95, 2)  # scipy.stats.chi2
FS = 8000.0
VEHICLE_MICS = np.array([(0, 0, 1.5), (25, 5, 1.2), (10, 30, 1.5), (-20, 20, 1.3),
                         (-15, -15, 1.4), (20, -20, 1.6)], float)  # 6 mics over ~60 m
AIRCRAFT_MICS = np.array([(0, 0, 1.5), (120, 30, 1.5), (-100, 80, 1.5), (-60, -110, 1.5),
                          (90, -100, 1.5), (10, 20, 10.0)], float)  # ~250 m, 10 m mast
JET_MICS = np.array([(0, 0, 1.5), (140, 40, 1.5), (-120, 90, 1.5), (-70, -130, 1.5),
                     (110, -110, 1.5), (15, 25, 10.0)], float)  # ~300 m, 10 m mast


def _unit(heading_deg):
    h = np.deg2rad(heading_deg)
    return np.array([np.sin(h), np.cos(h), 0.0]), np.array([np.cos(h), -np.sin(h), 0.0])


def _scene(name):
    """(mics, path, t_stop, fs, snr_db, band, dims, span) of each invented scene."""
    centre = VEHICLE_MICS.mean(axis=0)
    if name == "beside":  # 20 m/s on a road 30 m from the array centre
        d, n = _unit(60.0)
        cpa = centre + 30.0 * n
        cpa[2] = 0.5
        return (VEHICLE_MICS, synth.StraightPath(cpa - 140.0 * d, 20.0 * d), 14.0, FS, 10.0,
                (150.0, 3000.0), 2, (1.0, 13.5))
    if name == "through":  # 15 m/s straight through the middle of the array
        d, _ = _unit(100.0)
        cpa = centre.copy()
        cpa[2] = 0.5
        return (VEHICLE_MICS, synth.StraightPath(cpa - 90.0 * d, 15.0 * d), 12.0, FS, 10.0,
                (150.0, 3000.0), 2, (1.0, 11.5))
    if name == "turn":  # east at 12 m/s, a 90 deg left turn at t = 6 s, then north
        p0 = np.array([-70.0, -35.0, 0.5])
        p1 = p0 + np.array([72.0, 0.0, 0.0])
        path = synth.WaypointPath(np.array([0.0, 6.0, 12.0]),
                                  np.array([p0, p1, p1 + np.array([0.0, 72.0, 0.0])]))
        return VEHICLE_MICS, path, 12.0, FS, 10.0, (150.0, 3000.0), 2, (1.0, 11.5)
    if name == "accel":  # 5 -> 30 m/s at 2.5 m/s^2, 25 m from the array centre
        d, n = _unit(80.0)
        start = centre + 25.0 * n - 90.0 * d
        start[2] = 0.5
        return (VEHICLE_MICS, synth.AcceleratingPath(start, 5.0 * d, 2.5 * d), 10.0, FS, 10.0,
                (150.0, 3000.0), 2, (1.0, 9.8))
    if name == "aircraft":  # 300 m up, 55 m/s, 5 dB
        d, _ = _unit(70.0)
        path = synth.StraightPath(np.array([0.0, 0.0, 300.0]) - 12.0 * 55.0 * d, 55.0 * d)
        return AIRCRAFT_MICS, path, 24.0, 6000.0, 5.0, (80.0, 2000.0), 3, (2.0, 24.0)
    if name == "jet":  # 3000 m up, 220 m/s: heard ~9 s after emission
        d, _ = _unit(250.0)
        path = synth.StraightPath(np.array([300.0, 200.0, 3000.0]) - 12.0 * 220.0 * d,
                                  220.0 * d)
        return JET_MICS, path, 26.0, 4000.0, 10.0, (60.0, 1200.0), 3, (10.0, 34.0)
    if name == "aircraft-side":  # held-out kind: 300 m up, passing 250 m to the side
        d, n = _unit(20.0)
        p0 = np.array([0.0, 0.0, 300.0]) + 250.0 * n - 12.0 * 55.0 * d
        return (AIRCRAFT_MICS, synth.StraightPath(p0, 55.0 * d), 24.0, 6000.0, 5.0,
                (80.0, 2000.0), 3, (2.0, 24.0))
    if name == "jet-offset":  # 3000 m up, 1500 m to the side: ~10 s between emission and hearing
        d, n = _unit(135.0)
        p0 = np.array([0.0, 0.0, 3000.0]) + 1500.0 * n - 12.0 * 220.0 * d
        return (JET_MICS, synth.StraightPath(p0, 220.0 * d), 26.0, 4000.0, 10.0,
                (60.0, 1200.0), 3, (10.0, 34.0))
    raise KeyError(name)


def _write(folder, name, seed=1, extra=""):
    mics, path, t_stop, fs, snr, band, dims, span = _scene(name)
    sim = synth.simulate_moving(mics, path, (synth.Waveform("noise", band_hz=band),),
                                t_start_s=0.0, t_stop_s=t_stop, sample_rate_hz=fs, snr_db=snr,
                                absorption=False, rng=np.random.default_rng(seed))
    site = write_site(folder, mics, sim.signals, fs, temperature_c=20.0, humidity=50.0,
                      extra=extra)
    return site, path, span, dims


def _track(tmp_path, name, *extra_args, site_extra="", height=("--source-z", "0.5")):
    site, path, span, dims = _write(tmp_path, name, extra=site_extra)
    out = tmp_path / "track.json"
    args = ["track", site, "--from", span[0], "--to", span[1], "--json", out]
    args += ["--dims", "3"] if dims == 3 else list(height)
    code, stdout, stderr = run(args + list(extra_args))
    assert "Traceback" not in stderr
    doc = json.loads(out.read_text()) if code == 0 else None
    return code, stdout, stderr, doc, path


def _scores(doc, path):
    """Horizontal error of every point at its emission time, and its Mahalanobis distance."""
    pts = doc["track"]["points"]
    t_e = np.array([p["t_emit_s"] for p in pts])
    pos = np.array([p["position_m"] for p in pts])
    cov = np.array([p["covariance_m2"] for p in pts])[:, :2, :2]
    err = (pos - path.position_m(t_e))[:, :2]
    m2 = np.einsum("wi,wij,wj->w", err, np.linalg.inv(cov), err)
    return np.linalg.norm(err, axis=1), m2, pos


@pytest.mark.slow
@pytest.mark.parametrize("name", ["beside", "through", "turn", "accel"])
def test_vehicle_passes_meet_the_acceptance(tmp_path, name):
    # Issue 16: vehicles at 10 dB SNR, 6 mics over ~60 m: every point within 1 m of the truth at
    # its emission time, >= 85 % inside their 95 % ellipses, the turn within 0.5 s.
    # Measured (seed 1): max error beside 0.2 mm, through 0.2 mm, turn 0.42 m (at the corner;
    # turn at 6.08 s, -90.0 deg), accel 11 mm; inside 100 %, 100 %, 97 %, 100 %.
    code, stdout, stderr, doc, path = _track(tmp_path, name)
    assert code == 0, stderr
    tr = doc["track"]
    err, m2, _ = _scores(doc, path)
    assert err.max() <= 1.0
    assert np.mean(m2 < CHI2_95_2D) >= 0.85
    assert tr["misfit_chi2_reduced"] is not None and not tr["flagged"]
    assert "timing only" in (tr["uncertainty_note"] or "")
    assert any("timing only" in w for w in doc["warnings"])
    if name in ("beside", "through"):
        assert tr["model"] == "straight" and tr["straight_holds"]
        assert tr["heading_deg"] is not None
    else:
        # heading and speed per point, no overall heading when the path is not straight
        assert tr["model"] != "straight" and tr["heading_deg"] is None
        t_e = np.array([p["t_emit_s"] for p in tr["points"]])
        speed = np.array([p["speed_mps"] for p in tr["points"]])
        true_v = np.linalg.norm(path.velocity_mps(t_e), axis=1)
        inside = (t_e < 5.0) | (t_e > 7.0) if name == "turn" else np.ones(t_e.size, bool)
        assert np.max(np.abs(speed - true_v)[inside]) < 0.5  # m/s away from the corner
    if name == "turn":
        turns = [t for t in tr["turns"] if t["is_turn"]]
        assert len(turns) == 1
        assert abs(turns[0]["t_s"] - 6.0) <= 0.5
        assert abs(abs(turns[0]["heading_change_deg"]) - 90.0) <= 10.0
        assert "turn of" in stdout


@pytest.mark.slow
def test_straight_model_forced_on_a_turn_is_flagged_and_widened(tmp_path):
    # Never a confident wrong track: the straight model cannot explain a 90 deg turn; the track
    # must say so (stderr, JSON) and its ellipses must grow to cover the error it makes.
    code, _, stderr, doc, path = _track(tmp_path, "turn", "--model", "straight")
    assert code == 0, stderr
    tr = doc["track"]
    assert tr["flagged"] and tr["misfit_chi2_reduced"] > 2.0
    assert "does not explain the windows" in stderr
    assert any("does not explain" in w for w in doc["warnings"])
    err, m2, _ = _scores(doc, path)
    assert err.max() > 5.0  # the straight line is far off somewhere...
    # ...and its widened ellipses cover it as the issue asks of tracks (>= 85 %).  Measured
    # (seed 1): 79 % with the measured shifts alone, 100 % with the neighbours' largest shift.
    assert np.mean(m2 < CHI2_95_2D) >= 0.85


@pytest.mark.slow
def test_aircraft_with_a_mast_mic_in_3d(tmp_path):
    # Issue 16: 300 m altitude, 55 m/s, 6 mics over ~250 m with one on a 10 m mast, 5 dB, 3-D,
    # default speed guess: horizontal error <= 1 % of the range, >= 85 % inside, heading <= 2 deg.
    # Measured: max horizontal error 0.8 mm, 100 % inside, heading error < 1e-4 deg.
    code, _, stderr, doc, path = _track(tmp_path, "aircraft")
    assert code == 0, stderr
    err, m2, pos = _scores(doc, path)
    rng = np.linalg.norm(pos - AIRCRAFT_MICS.mean(axis=0), axis=1)
    assert np.all(err <= 0.01 * rng)
    assert np.mean(m2 < CHI2_95_2D) >= 0.85
    tr = doc["track"]
    assert abs((tr["heading_deg"] - 70.0 + 180.0) % 360.0 - 180.0) <= 2.0
    assert abs(np.mean(pos[:, 2]) - 300.0) < 3.0


@pytest.mark.slow
def test_jet_at_3000_m(tmp_path):
    # Issue 16: a jet at 3000 m, 220 m/s over a ~300 m array (retarded-time lag ~9 s): horizontal
    # error <= 1 % of the range, >= 85 % inside, heading within 2 deg.
    # Measured: max horizontal error 16 mm, 100 % inside (91 % before the point covariance was
    # taken at the stated emission time), heading error < 1e-4 deg.
    code, _, stderr, doc, path = _track(tmp_path, "jet")
    assert code == 0, stderr
    err, m2, pos = _scores(doc, path)
    rng = np.linalg.norm(pos - JET_MICS.mean(axis=0), axis=1)
    assert np.all(err <= 0.01 * rng)
    assert np.mean(m2 < CHI2_95_2D) >= 0.85
    tr = doc["track"]
    assert abs((tr["heading_deg"] - 250.0 + 180.0) % 360.0 - 180.0) <= 2.0
    assert abs(tr["speed_mps"] - 220.0) <= 0.02 * 220.0
    lags = [p["t_heard_s"] - p["t_emit_s"] for p in tr["points"]]
    assert min(lags) > 8.0  # seconds between emission and hearing (3000 m / 344 m/s)


@pytest.mark.slow
@pytest.mark.parametrize("name", ["jet-offset", "aircraft-side"])
def test_aircraft_off_the_array_meet_the_acceptance(tmp_path, name):
    # Issue 16 held-out kinds: a jet 3000 m up and 1500 m to the side (before: refused, then
    # 6 % inside - its point covariance was that of the heard-from point, which a range error
    # moves along the track by v/c of it), a light aircraft passing 250 m to the side.
    # Measured (seed 1): jet-offset 10 m max horizontal error (0.25 % of range), 100 % inside;
    # aircraft-side 3 mm, 100 % inside; heading errors < 0.1 deg.
    code, _, stderr, doc, path = _track(tmp_path, name)
    assert code == 0, stderr
    err, m2, pos = _scores(doc, path)
    mics = JET_MICS if name == "jet-offset" else AIRCRAFT_MICS
    rng = np.linalg.norm(pos - mics.mean(axis=0), axis=1)
    assert np.all(err <= 0.01 * rng)
    assert np.mean(m2 < CHI2_95_2D) >= 0.85
    t_e = np.array([p["t_emit_s"] for p in doc["track"]["points"]])
    v = path.velocity_mps(t_e)
    true_h = np.rad2deg(np.arctan2(v[:, 0], v[:, 1]))
    hd = np.array([p["heading_deg"] for p in doc["track"]["points"]])
    assert np.median(np.abs((hd - true_h + 180.0) % 360.0 - 180.0)) <= 2.0
    # the emission time is reported with its sd (a range error is a timing error too)
    assert all(p["t_emit_sd_s"] is not None and p["t_emit_sd_s"] >= 0.0
               for p in doc["track"]["points"])


@pytest.mark.slow
@pytest.mark.parametrize("guess", ["250", "0.1"])
def test_any_physical_speed_guess_tracks_or_refuses_cleanly(tmp_path, guess):
    # Issue 16: any --speed-guess, no traceback; a track it gives is right or flagged.
    code, _, stderr, doc, path = _track(tmp_path, "beside", "--speed-guess", guess)
    assert code in (0, 1), stderr
    if code == 0:
        err, m2, _ = _scores(doc, path)
        assert doc["track"]["flagged"] or (err.max() < 1.0
                                           and np.mean(m2 < CHI2_95_2D) >= 0.85)
    else:
        assert stderr.count("\n") == 1 and stderr.startswith("tdoa: error:")


@pytest.mark.slow
def test_segments_model_and_declared_survey(tmp_path):
    # --model segments (it crashed before issue 16) on a straight pass, with a [survey] table:
    # the declared 5 cm mic positions (docs/uncertainty.md) widen the ellipses and heading sd
    # beyond the timing-only ones, and the note says what is included.
    code, stdout, stderr, doc, path = _track(tmp_path, "beside", "--model", "segments",
                                             site_extra="\n[survey]\nposition_sd_m = 0.05\n")
    assert code == 0, stderr
    tr = doc["track"]
    assert tr["model"] in ("segments", "straight")
    assert tr["uncertainty"]["declared"] and "mic positions" in tr["uncertainty_note"]
    assert "Uncertainty: includes" in stdout
    err, m2, _ = _scores(doc, path)
    assert err.max() < 1.0 and np.mean(m2 < CHI2_95_2D) >= 0.85
    sd = np.sqrt([np.array(p["covariance_m2"])[0, 0] for p in tr["points"]])
    assert np.median(sd) > 0.005  # m: survey error, not the ~0.1 mm timing error


@pytest.mark.parametrize("guess", ["1e6", "-5", "0", "nan"])
def test_unphysical_speed_guess_is_refused_in_one_line(tmp_path, guess):
    x = np.random.default_rng(0).normal(size=(6, 16000))
    site = write_site(tmp_path, VEHICLE_MICS, x, FS)
    code, _, stderr = run(["track", site, "--from", 0, "--to", 2, "--speed-guess", guess])
    assert code == 2
    assert stderr.count("\n") == 1 and "--speed-guess" in stderr and "Traceback" not in stderr


@pytest.mark.parametrize("span_s", [0.3, 0.6, 1.0])
def test_a_span_too_short_for_a_track_says_so(tmp_path, span_s):
    # Issue 16: a short span is refused with its real reason (not "no coherent sound"): the
    # start search needs 3 windows and the fit 4 (locate.track.tracker.MIN_*_WINDOWS; a line
    # through bearings needs three directions - common practice).
    x = np.random.default_rng(0).normal(size=(6, 16000))
    site = write_site(tmp_path, VEHICLE_MICS, x, FS)
    code, _, stderr = run(["track", site, "--from", 0.5, "--to", 0.5 + span_s])
    assert code == 2
    assert stderr.count("\n") == 1 and "Traceback" not in stderr
    assert "too short for a track" in stderr and "--from/--to" in stderr
    assert "coherent" not in stderr


def test_internal_failure_is_one_line_and_exit_1(tmp_path, monkeypatch):
    from locate.track import tracker

    def broken(*args, **kwargs):
        raise IndexError("index -9223372036854775808 is out of bounds")

    monkeypatch.setattr(tracker, "track_recording", broken)
    x = np.random.default_rng(0).normal(size=(6, 16000))
    site = write_site(tmp_path, VEHICLE_MICS, x, FS)
    out = tmp_path / "r.json"
    code, _, stderr = run(["track", site, "--from", 0, "--to", 2, "--json", out])
    assert code == 1
    assert stderr.count("\n") == 1 and "failed internally" in stderr
    assert "Traceback" not in stderr and not out.exists()


@pytest.mark.slow
def test_batch_track_task_gives_the_same_track_as_the_command(tmp_path):
    # Issue 16: a ``track`` task of ``tdoa batch`` (docs/batch.md) runs the same command.
    site, path, span, _ = _write(tmp_path, "through")
    (tmp_path / "jobs.toml").write_text(f"""
[defaults]
output_dir = "out"

[[task]]
name = "pass"
site = "site.toml"
command = "track"
from = {span[0]}
to = {span[1]}
options = {{ source_z = 0.5 }}
""")
    code, _, stderr = run(["batch", tmp_path / "jobs.toml", "--jobs", "1"])
    assert code == 0, stderr
    doc = json.loads((tmp_path / "out" / "pass.json").read_text())
    assert doc["kind"] == "track" and doc["track"]["model"] == "straight"
    err, m2, _ = _scores(doc, path)
    assert err.max() < 1.0 and np.mean(m2 < CHI2_95_2D) >= 0.85


@pytest.mark.slow
@pytest.mark.parametrize("name", ["beside", "turn"])
def test_a_vehicle_tracked_without_its_height_is_read_from_the_delays(tmp_path, name):
    # Source height is rarely known in the field: without --source-z a 2-D track assumes
    # 1.0 +- 0.6 m (as `fix`), reads the height from the delays (the vehicles here radiate from
    # 0.5 m), and stays unflagged with >= 85 % of the points inside their 95 % ellipses.
    # Measured (seed 1): beside 0.51 m, turn 0.50 m; max error 2 mm, 0.44 m; inside 100 %, 93 %.
    code, stdout, stderr, doc, path = _track(tmp_path, name, height=())
    assert code == 0, stderr
    tr = doc["track"]
    hgt = tr["source_height"]
    assert hgt["prior_z_m"] == 1.0 and hgt["prior_sd_m"] == 0.6
    assert abs(hgt["used_z_m"] - 0.5) <= 0.15, hgt
    assert doc["source_z_m"] == pytest.approx(hgt["used_z_m"])
    assert "Source height:" in stdout
    err, m2, _ = _scores(doc, path)
    assert err.max() <= 1.0
    assert np.mean(m2 < CHI2_95_2D) >= 0.85
    assert not tr["flagged"], tr["misfit_chi2_reduced"]
