"""Benchmark (run on demand): ``tdoa fix --window 0.5`` against the bare FFT floor, peak memory.

    python tests/benchmarks/bench_windows.py                 # 2 min and 30 min, events on 1 h
    python tests/benchmarks/bench_windows.py --minutes 2     # one length only
    python tests/benchmarks/bench_windows.py --write-docs    # also rewrite the table in
                                                             # docs/benchmarks.md
    python tests/benchmarks/bench_windows.py --baseline /path/to/other/checkout
                                                             # the same command from another
                                                             # checkout, same run

Scene: 8 mics x 48 kHz (PCM_16 WAV), a steady 100-3000 Hz noise source 40 m outside an
invented 20 m array, 10 dB SNR, made by the exact simulator (:mod:`locate.synth`) in 2-minute
pieces laid end to end (longer spans repeat them; the seams are steps in the noise, no change
of source).  For each length, in one run:

(a) the whole command ``tdoa fix SITE --from 0 --to T --window 0.5 --json out.json`` in a
    child process: wall time and peak resident memory (``VmHWM``);
(b) the bare float64 FFT work of the same windows, in this process, before and after (a):
    forward ``scipy.fft.rfft`` of every window of every channel at the padded size
    ``estimate_delays`` uses, and one ``irfft`` per pair, all cores (the compute floor).
The ratio (a)/(b) is the number to compare across machines and loads; the load average is
printed beside it.  ``events`` on one hour: wall time and peak memory, same way.  Batched
fixes per second come from ``bench_scale.py --only fixes``.  Nothing here asserts a time.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import re
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile
from scipy import fft as sfft

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from locate.signal.delays import all_pairs, geometric_max_lag_s  # noqa: E402
from locate.synth import Emission, Waveform, simulate_events  # noqa: E402
from tests.benchmarks.bench_scale import _PEAK, MICS8_M, bench_fixes  # noqa: E402
from tests.field_scene import site_dict, write_site  # noqa: E402

FS = 48000
SOURCE_M = np.array([45.0, 30.0, 1.0])
PIECE_S = 120.0
WINDOW_S = 0.5


def write_scene(folder, minutes):
    """The steady scene, ``minutes`` long, and its site file; returns the site path."""
    folder.mkdir(parents=True, exist_ok=True)
    wave = Waveform(kind="noise", band_hz=(100.0, 3000.0), duration_s=PIECE_S + 0.5,
                    rms_pa_at_1m=2.0)
    sim = simulate_events(MICS8_M, [Emission(SOURCE_M, -0.25, wave)], sample_rate_hz=FS,
                          duration_s=PIECE_S, temperature_c=20.0, relative_humidity=60.0,
                          snr_db=10.0, rng=np.random.default_rng(7))
    piece = (sim.signals / (4 * np.max(np.abs(sim.signals)))).T.astype(np.float32)
    n_total = int(minutes * 60 * FS)
    with soundfile.SoundFile(str(folder / "steady.wav"), "w", samplerate=FS, channels=8,
                             subtype="PCM_16") as fh:
        for a in range(0, n_total, len(piece)):
            fh.write(piece[: min(len(piece), n_total - a)])
    return write_site(folder / "site.toml", site_dict(MICS8_M, temperature_c=20.0,
                                                     recording="steady.wav"))


def fft_floor(wav, stop_s, workers=-1):
    """Seconds of bare FFT work for the 0.5 s windows of ``[0, stop_s)`` (reading excluded)."""
    n = int(WINDOW_S * FS)
    pairs = all_pairs(8)
    ii, jj = pairs.T
    lag = np.minimum(np.ceil(geometric_max_lag_s(MICS8_M, pairs, 343.0) * FS).astype(int) + 1,
                     n - 1)
    nfft = sfft.next_fast_len(n + int(lag.max()) + 1, real=True)
    spent = 0.0
    with soundfile.SoundFile(str(wav)) as fh:
        for _ in np.arange(0.0, stop_s, 60.0):
            x = fh.read(60 * FS, dtype="float64").T
            t = time.perf_counter()
            for s in range(0, x.shape[1] - n + 1, 8 * n):
                win = np.stack([x[:, k:k + n] for k in range(s, min(s + 8 * n,
                                                                   x.shape[1] - n + 1), n)])
                spec = sfft.rfft(win, nfft, axis=-1, workers=workers)
                sfft.irfft(np.conj(spec[:, ii]) * spec[:, jj], nfft, axis=-1, workers=workers)
            spent += time.perf_counter() - t
    return spent, nfft


def _child_cpu_s():
    use = resource.getrusage(resource.RUSAGE_CHILDREN)
    return use.ru_utime + use.ru_stime


def command(args, cwd=ROOT):
    """(wall s, peak MB, exit code, CPU s) of ``tdoa ARGS`` in a fresh child process (CPU:
    user + system time of the child, less sensitive to other jobs on the machine than wall)."""
    t, cpu = time.perf_counter(), _child_cpu_s()
    proc = subprocess.run([sys.executable, "-c", _PEAK, *map(str, args)], cwd=cwd,
                          capture_output=True, text=True)
    wall = time.perf_counter() - t
    kb = [int(v.split()[1]) for v in proc.stderr.splitlines() if v.startswith("PEAK_KB")]
    return (wall, (kb[-1] / 1024.0 if kb else float("nan")), proc.returncode,
            _child_cpu_s() - cpu)


def bench_fix(folder, minutes, baseline=None):
    """The command (and, with ``baseline``, the same command run from that checkout: the
    package is imported from the child's working folder) between two FFT-floor runs."""
    site = write_scene(folder / f"steady-{minutes:g}", minutes)
    stop = minutes * 60.0
    load0 = os.getloadavg()[0]
    floor1, nfft = fft_floor(site.parent / "steady.wav", stop)
    args = ["fix", site, "--from", 0, "--to", stop, "--window", WINDOW_S, "--json",
            site.parent / "out.json", "--quiet"]
    wall, mb, code, cpu = command(args)
    base = None
    if baseline is not None:
        b_wall, b_mb, b_code, b_cpu = command(args, cwd=baseline)
        rev = subprocess.run(["git", "-C", str(baseline), "rev-parse", "--short", "HEAD"],
                             capture_output=True, text=True).stdout.strip()
        base = {"wall_s": b_wall, "peak_mb": b_mb, "exit": b_code, "cpu_s": b_cpu,
                "rev": rev or str(baseline)}
    floor2, _ = fft_floor(site.parent / "steady.wav", stop)
    floor = min(floor1, floor2)
    return {"minutes": minutes, "wall_s": wall, "peak_mb": mb, "exit": code, "floor_s": floor,
            "nfft": nfft, "rtf": stop / wall, "ratio": wall / floor,
            "load": (load0 + os.getloadavg()[0]) / 2, "cpu_s": cpu, "baseline": base}


def bench_events(folder, minutes=60.0):
    from tests.benchmarks.bench_events_memory import MICS6_M, write_recording

    audio = folder / "events.wav"
    write_recording(audio, minutes, max(2, int(8 * minutes / 60)), "wav")
    site = write_site(folder / "events.toml", site_dict(MICS6_M, temperature_c=10.0,
                                                        recording=audio.name))
    wall, mb, code, _ = command(["events", site])
    return {"minutes": minutes, "wall_s": wall, "peak_mb": mb, "exit": code,
            "rtf": minutes * 60.0 / wall}


def table(fixes, events, fixes_per_s):
    rows = ["| measurement | value | note |", "|---|---|---|"]
    for r in fixes:
        rows.append(f"| `fix --window 0.5`, {r['minutes']:g} min, 8 ch x 48 kHz | "
                    f"{r['wall_s']:.1f} s, {r['rtf']:.1f}x real time, peak {r['peak_mb']:.0f} MB"
                    f" | {r['ratio']:.1f}x the bare float64 FFT work of the same windows "
                    f"({r['floor_s']:.1f} s, nfft {r['nfft']}); command CPU time "
                    f"{r['cpu_s']:.1f} s; load average {r['load']:.1f}; exit {r['exit']} |")
        b = r.get("baseline")
        if b:
            rows.append(f"| the same, before (commit {b['rev']}, same run) | {b['wall_s']:.1f} s, "
                        f"{r['minutes'] * 60 / b['wall_s']:.1f}x real time, peak "
                        f"{b['peak_mb']:.0f} MB | {b['wall_s'] / r['floor_s']:.1f}x the FFT "
                        f"work; command CPU time {b['cpu_s']:.1f} s; exit {b['exit']} |")
    if events:
        rows.append(f"| `events`, {events['minutes']:g} min, 6 ch x 48 kHz | "
                    f"{events['wall_s']:.0f} s, {events['rtf']:.0f}x real time, peak "
                    f"{events['peak_mb']:.0f} MB | exit {events['exit']} |")
    if fixes_per_s:
        rows.append(f"| batched fixes, 8 mics | {fixes_per_s['fixes_per_s']:.0f} fixes/s | "
                    f"`locate.fix.batched.locate_batch`, {fixes_per_s['sets']} sets |")
    return "\n".join(rows)


MARK_A, MARK_B = "<!-- bench_windows: begin -->", "<!-- bench_windows: end -->"


def write_docs(text):
    page = ROOT / "docs" / "benchmarks.md"
    doc = page.read_text()
    block = (f"{MARK_A}\nMeasured {dt.date.today().isoformat()} with "
             f"`python tests/benchmarks/bench_windows.py --write-docs` on a "
             f"{os.cpu_count()}-core machine.\n\n{text}\n{MARK_B}")
    if MARK_A in doc:
        doc = re.sub(re.escape(MARK_A) + ".*?" + re.escape(MARK_B), lambda m: block, doc,
                     flags=re.S)
    else:
        doc = doc.rstrip() + "\n\n## `fix --window`: whole command, FFT floor, memory\n\n" \
            + block + "\n"
    page.write_text(doc)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, action="append", default=None)
    ap.add_argument("--no-events", action="store_true")
    ap.add_argument("--write-docs", action="store_true")
    ap.add_argument("--baseline", type=Path, default=None,
                    help="also run the command from this checkout (e.g. the main branch)")
    args = ap.parse_args(argv)
    folder = Path(tempfile.mkdtemp(prefix="tdoa-bench-windows-"))
    try:
        fixes = []
        for minutes in args.minutes or [2.0, 30.0]:
            fixes.append(bench_fix(folder, minutes, args.baseline))
            print(fixes[-1], flush=True)
        events = None if args.no_events else bench_events(folder)
        text = table(fixes, events, bench_fixes())
        print(text)
        if args.write_docs:
            write_docs(text)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
