"""Helpers shared by the field-realities tests and benchmarks: simulated surveys on disk.

The recordings come from :mod:`locate.synth` (the project's exact simulator).  Long recordings
are written window by window so that nothing the size of the whole recording is ever held in
memory: each event is simulated in a short window whose clock offsets are shifted so that its
first sample is sample ``n0`` of the long file (synth clock model: sample n of mic i is at true
time n / (fs (1 + ppm_i 1e-6)) + offset_i), then added into the blocks being written.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import soundfile

from locate import synth
from locate.io.site import dump_site_toml

GAIN_FS_PER_PA = 0.02  # recorder gain: full scale per pascal (0 dBFS ~ 128 dB SPL)

# An invented array: 7 mics over ~60 m, heights 1.2-2.6 m (local metres, x east, y north).
MICS7_M = np.array([[0.0, 0.0, 1.5], [52.0, 4.0, 1.2], [58.0, 47.0, 2.0], [6.0, 55.0, 1.6],
                    [28.0, 25.0, 2.6], [-14.0, 30.0, 1.4], [30.0, -16.0, 1.8]])


def burst(duration_s=0.15, band_hz=(300.0, 3500.0), rms_pa_at_1m=2.0):
    return synth.Waveform(kind="noise", band_hz=band_hz, duration_s=duration_s,
                          rms_pa_at_1m=rms_pa_at_1m)


def site_dict(mics_m, *, temperature_c=15.0, relative_humidity=60.0, coordinates="local",
              geodetic=None, recording=None, mic_files=None, start_times=None, title="scene",
              extra_air=None):
    """A raw site dict (TOML-ready) for the positions given."""
    raw = {"title": title, "coordinates": coordinates,
           "air": {"temperature_c": float(temperature_c),
                   "relative_humidity": float(relative_humidity), **(extra_air or {})}}
    if recording is not None:
        raw["recording"] = {"file": str(recording)}
    mics = []
    for k, p in enumerate(np.asarray(mics_m, float)):
        m = {"name": f"M{k + 1}"}
        if coordinates == "wgs84":
            lat, lon, alt = geodetic[k]
            m.update(lat=float(lat), lon=float(lon), alt=float(alt))
        else:
            m.update(x=float(p[0]), y=float(p[1]), z=float(p[2]))
        if mic_files is not None:
            m["file"] = str(mic_files[k])
        else:
            m["channel"] = k + 1
        if start_times is not None:
            m["start_time"] = start_times[k]
        mics.append(m)
    raw["mics"] = mics
    return raw


def write_site(path, raw) -> Path:
    path = Path(path)
    path.write_text(dump_site_toml(raw), encoding="utf-8")
    return path


def write_multichannel(path, sim, *, gain=GAIN_FS_PER_PA):
    x = sim.signals * gain
    assert np.max(np.abs(x)) < 1.0, "simulated recording clips: lower the gain"
    soundfile.write(str(path), x.T, int(sim.sample_rate_hz), subtype="FLOAT")
    return Path(path)


def iso(t0: dt.datetime, seconds: float) -> str:
    """ISO 8601 UTC stamp ``t0 + seconds`` with microseconds."""
    t = t0 + dt.timedelta(seconds=float(seconds))
    return t.strftime("%Y-%m-%dT%H:%M:%S.%f") + "Z"


def write_separate_recorders(folder, mics_m, emissions, *, sample_rate_hz, duration_s,
                             true_offsets_s, drift_ppm, temperature_c, relative_humidity=60.0,
                             noise_fs=2e-4, seed=0, window_s=1.2, block_s=20.0,
                             gain=GAIN_FS_PER_PA, prefix="rec"):
    """One mono FLOAT WAV per mic, ``duration_s`` long, written block by block.

    Each emission is simulated (with its own noise, seeded by ``(seed, event index)``) in a
    ``window_s`` window that replaces the background noise there, so two calls that differ only
    in their clocks give every event the same signal and the same noise sample by sample.

    Parameters
    ----------
    mics_m : (N, 3)
    emissions : sequence of synth.Emission (true times)
    true_offsets_s, drift_ppm : (N,)
        True clock: sample n of mic i is at true time n / (fs (1 + ppm_i 1e-6)) + offset_i.
    noise_fs : float
        White-noise rms, full scale.

    Returns
    -------
    list of Path
    """
    folder = Path(folder)
    fs = float(sample_rate_hz)
    mics_m = np.asarray(mics_m, float)
    n_mic = len(mics_m)
    off = np.asarray(true_offsets_s, float)
    ppm = np.asarray(drift_ppm, float)
    scale = fs * (1.0 + ppm * 1e-6)
    windows = []  # (n0 (N,), signals (N, M)) in full scale
    for e, ev in enumerate(emissions):
        n0 = np.floor((ev.t_emit_s - off) * scale).astype(np.int64) - int(0.05 * fs)
        off_w = off + n0 / scale  # true time of the window's first sample, per mic
        sim = synth.simulate_events(mics_m, [ev], sample_rate_hz=fs, duration_s=window_s,
                                    temperature_c=temperature_c,
                                    relative_humidity=relative_humidity,
                                    clock_offsets_s=off_w, clock_drift_ppm=ppm,
                                    noise_rms=noise_fs / gain,
                                    rng=np.random.default_rng([seed, 1000 + e]))
        windows.append((n0, sim.signals * gain))
    n_total = int(round(duration_s * fs))
    block = int(block_s * fs)
    paths = []
    for i in range(n_mic):
        p = folder / f"{prefix}{i + 1}.wav"
        nrng = np.random.default_rng([seed, i])
        with soundfile.SoundFile(str(p), "w", samplerate=int(fs), channels=1,
                                 subtype="FLOAT") as f:
            for a in range(0, n_total, block):
                b = min(a + block, n_total)
                x = noise_fs * nrng.standard_normal(b - a)
                for n0, sig in windows:
                    lo, hi = max(a, n0[i]), min(b, n0[i] + sig.shape[1])
                    if hi > lo:
                        x[lo - a:hi - a] = sig[i, lo - n0[i]:hi - n0[i]]
                assert np.max(np.abs(x)) < 1.0
                f.write(x.astype(np.float32))
        paths.append(p)
    return paths


def fix_errors_m(result, truth_m):
    """Horizontal distance of each fix to the nearest true position, metres."""
    pos = np.array([f["position_m"] for f in result["fixes"]], float)[:, :2]
    t = np.asarray(truth_m, float)[:, :2]
    d = np.linalg.norm(pos[:, None, :] - t[None, :, :], axis=-1)
    return d.min(axis=1)


def run_cli(args):
    """Run ``tdoa`` through its real entry point; returns (exit code, stdout, stderr)."""
    from click.testing import CliRunner

    from locate.cli import main

    runner = CliRunner()

    def call():
        main([str(a) for a in args])

    res = runner.invoke(_Wrapped(call), [])
    return res.exit_code, res.stdout, res.stderr


class _Wrapped:
    """A click-like callable so CliRunner can capture ``main()``'s SystemExit and streams."""

    name = "tdoa"

    def __init__(self, fn):
        self.fn = fn

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **kw):
        self.fn()
