"""Benchmark (run on demand): peak memory of ``tdoa events`` on a 1-hour, 6-channel, 48 kHz file.

Issue 5 asks that an hour-long multichannel recording be scanned for events in bounded memory
(goal: peak below 400 MB).  This script writes such a recording on /tmp block by block (low-level
noise plus a few bangs from the simulator; never committed), then runs ``python -m locate events``
in a child process and reads the child's peak resident set size from
``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss`` (kilobytes on Linux).

    python tests/benchmarks/bench_events_memory.py            # 60 min, WAV PCM_16
    python tests/benchmarks/bench_events_memory.py --format flac --keep

Not part of the default test run (pytest only collects test_*.py).
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import soundfile

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from locate import synth  # noqa: E402
from tests.field_scene import site_dict, write_site  # noqa: E402

MICS6_M = np.array([[0.0, 0.0, 1.5], [60.0, 5.0, 1.4], [65.0, 58.0, 1.6], [4.0, 62.0, 1.5],
                    [30.0, 28.0, 2.5], [-15.0, 30.0, 1.3]])
FS = 48000
NOISE_FS = 3e-4  # background noise rms, full scale (about -70 dBFS)
GAIN = 0.01  # full scale per pascal


def write_recording(path, minutes, n_bangs, fmt, seed=0):
    """Write the long recording block by block; returns the true bang times (s)."""
    rng = np.random.default_rng(seed)
    n_total = int(minutes * 60 * FS)
    times = np.sort(rng.uniform(30.0, minutes * 60 - 30.0, n_bangs))
    bang = synth.Waveform(kind="impulse", band_hz=(150.0, 6000.0), duration_s=0.1,
                          rms_pa_at_1m=20.0)
    windows = []
    for t in times:
        src = np.array([rng.uniform(0, 60), rng.uniform(0, 60), 1.0])
        sim = synth.simulate_events(MICS6_M, [synth.Emission(src, 0.05, bang)],
                                    sample_rate_hz=FS, duration_s=0.6, temperature_c=10.0,
                                    rng=rng)
        windows.append((int(round((t - 0.05) * FS)), sim.signals * GAIN))
    block = 10 * FS
    subtype = "PCM_16"
    with soundfile.SoundFile(str(path), "w", samplerate=FS, channels=len(MICS6_M),
                             subtype=subtype, format=fmt.upper()) as f:
        for a in range(0, n_total, block):
            b = min(a + block, n_total)
            x = NOISE_FS * rng.standard_normal((b - a, len(MICS6_M)))
            for n0, sig in windows:
                lo, hi = max(a, n0), min(b, n0 + sig.shape[1])
                if hi > lo:
                    x[lo - a:hi - a] += sig[:, lo - n0:hi - n0].T
            f.write(np.clip(x, -1.0, 1.0))
    return times


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=60.0)
    ap.add_argument("--bangs", type=int, default=8)
    ap.add_argument("--format", choices=("wav", "flac"), default="wav")
    ap.add_argument("--folder", default="/tmp/tdoa-bench-events")
    ap.add_argument("--keep", action="store_true", help="keep the recording afterwards")
    args = ap.parse_args(argv)
    folder = Path(args.folder)
    folder.mkdir(parents=True, exist_ok=True)
    audio = folder / f"hour.{args.format}"
    t0 = time.time()
    times = write_recording(audio, args.minutes, args.bangs, args.format)
    info = soundfile.info(str(audio))
    print(f"wrote {audio} ({audio.stat().st_size / 1e9:.2f} GB, {info.channels} ch, "
          f"{info.samplerate} Hz, {info.duration / 60:.1f} min) in {time.time() - t0:.0f} s")
    site = write_site(folder / "site.toml", site_dict(MICS6_M, temperature_c=10.0,
                                                       recording=audio.name))
    t0 = time.time()
    proc = subprocess.run([sys.executable, "-m", "locate", "events", str(site)],
                          capture_output=True, text=True, cwd=ROOT)
    peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    print(proc.stdout.strip())
    if proc.returncode != 0:
        print(proc.stderr.strip())
    found = [float(line.split()[1]) for line in proc.stdout.splitlines()[2:] if line.strip()]
    matched = sum(any(abs(f - t) < 0.5 for f in found) for t in times)
    print(f"tdoa events: exit {proc.returncode}, {len(found)} event(s) found, {matched} of "
          f"{len(times)} planted bangs matched, {time.time() - t0:.0f} s")
    print(f"peak memory (max RSS of the child process): {peak_mb:.0f} MB (goal < 400 MB)")
    if not args.keep:
        audio.unlink()
    return 0 if (proc.returncode == 0 and peak_mb < 400.0) else 1


if __name__ == "__main__":
    sys.exit(main())
