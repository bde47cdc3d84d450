"""Acceptance measurement (run on demand): separate recorders calibrated by ``tdoa sync``.

Issue 5: recorders with clock offsets up to +-2 s and drift up to 20 ppm over 10 minutes,
calibrated by two reference sounds; afterwards the fixes of the other events must be as good as
with perfect clocks (RMSE within 1.2x).

The scene (invented): 7 mics over ~75 m, one mono 48 kHz file per recorder, 10 minutes each,
with start_time stamps that are up to 2 s wrong and clocks up to 20 ppm off.  A loudspeaker
chirp (1 s, 300-3500 Hz) is played at a surveyed point near the start and near the end; 20
bursts at random places in between.  The same scene is written a second time with perfect
clocks; every event has the same signal and noise sample by sample in both (tests/field_scene),
so the comparison isolates the clocks.

    python tests/benchmarks/accept_separate_recorders.py [--minutes 10] [--events 20]

Files go to /tmp and are removed afterwards (``--keep`` keeps them).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import shutil
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from locate import synth  # noqa: E402
from locate.io.site import load_site, start_time_offsets_s  # noqa: E402
from tests.field_scene import (  # noqa: E402
    MICS7_M,
    burst,
    iso,
    run_cli,
    site_dict,
    write_separate_recorders,
    write_site,
)

REF_POINT = np.array([25.0, 20.0, 1.5])


def _errors(result, truth):
    pos = np.array([f["position_m"][:2] for f in result["fixes"]])
    d = np.linalg.norm(truth[:, None, :2] - pos[None], axis=-1)
    return np.where(d.min(axis=1) < 1.0, d.min(axis=1), np.nan)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--events", type=int, default=20)
    ap.add_argument("--rate", type=float, default=48000.0)
    ap.add_argument("--reference-pa", type=float, default=5.0,
                    help="rms of the reference chirp at 1 m, Pa (the bursts are 1 Pa)")
    ap.add_argument("--folder", default="/tmp/tdoa-accept-recorders")
    ap.add_argument("--keep", action="store_true")
    args = ap.parse_args(argv)
    folder = Path(args.folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(5)
    n, dur = len(MICS7_M), args.minutes * 60.0
    off = np.r_[0.0, rng.uniform(-2, 2, n - 1)]
    ppm = np.r_[0.0, rng.uniform(-20, 20, n - 1)]
    stamp_err = rng.uniform(-2, 2, n)
    ref = synth.Waveform(kind="chirp", band_hz=(300.0, 3500.0), duration_s=1.0,
                         rms_pa_at_1m=args.reference_pa)
    srcs = np.array([[rng.uniform(-10, 60), rng.uniform(-10, 60), 1.0]
                     for _ in range(args.events)])
    emissions = ([synth.Emission(REF_POINT, 5.0, ref)]
                 + [synth.Emission(s, t, burst(rms_pa_at_1m=1.0))
                    for s, t in zip(srcs, np.linspace(15, dur - 15, len(srcs)), strict=True)]
                 + [synth.Emission(REF_POINT, dur - 6.0, ref)])
    common = dict(sample_rate_hz=args.rate, duration_s=dur, temperature_c=15.0,
                  noise_fs=4e-4, window_s=1.5)
    t0 = time.time()
    files = write_separate_recorders(folder, MICS7_M, emissions, true_offsets_s=off,
                                     drift_ppm=ppm, **common)
    perfect = write_separate_recorders(folder, MICS7_M, emissions, true_offsets_s=np.zeros(n),
                                       drift_ppm=np.zeros(n), prefix="perfect", **common)
    start = dt.datetime(2026, 5, 14, 21, 0, 0)
    site = write_site(folder / "site.toml", site_dict(
        MICS7_M, temperature_c=15.0, mic_files=[p.name for p in files],
        start_times=[iso(start, off[i] + stamp_err[i]) for i in range(n)]))
    good = write_site(folder / "perfect.toml", site_dict(
        MICS7_M, temperature_c=15.0, mic_files=[p.name for p in perfect]))
    print(f"scene written in {time.time() - t0:.0f} s: {n} recorders x {args.minutes:g} min at "
          f"{args.rate:g} Hz; offsets {np.round(off, 3)} s, drifts {np.round(ppm, 2)} ppm")

    t0 = time.time()
    code, out, err = run_cli(["sync", site, "--at", "25,20,1.5", "--from", "5", "--to", "11",
                              "--at2", "25,20,1.5", "--from2", f"{dur - 6}",
                              "--to2", f"{dur - 0.1}", "-o", folder / "synced.toml",
                              "--json", folder / "sync.json"])
    print(out + err, f"(sync: {time.time() - t0:.0f} s)")
    if code:
        return code
    rep = json.loads((folder / "sync.json").read_text())
    st = start_time_offsets_s(load_site(site).mics)
    truth = (off - off[0]) - (st - st[0])
    got = np.array([m["offset_s"] for m in rep["mics"]])
    drift = np.array([m["drift_ppm"] for m in rep["mics"]])
    print("offset error (us):", np.round((got - truth) * 1e6, 3))
    print("offset sd    (us):", np.round([m["offset_sd_s"] * 1e6 for m in rep["mics"]], 3))
    print("drift error (ppm):", np.round(drift - ppm, 5))
    print("drift sd    (ppm):", np.round([m["drift_sd_ppm"] for m in rep["mics"]], 5))

    errs = {}
    for name, path in (("after sync", folder / "synced.toml"), ("perfect clocks", good)):
        t0 = time.time()
        js = folder / f"fix-{name.split()[0]}.json"
        code, out, err = run_cli(["fix", path, "--source-z", "1.0", "--band", "300:3500",
                                  "--threshold", "6", "--json", js])
        if code:
            print(err)
            return code
        errs[name] = _errors(json.loads(js.read_text()), srcs)
        print(f"fix ({name}): {np.isfinite(errs[name]).sum()} of {len(srcs)} events, "
              f"{time.time() - t0:.0f} s")
    ok = np.isfinite(errs["after sync"]) & np.isfinite(errs["perfect clocks"])
    rmse = {k: float(np.sqrt(np.mean(v[ok] ** 2))) for k, v in errs.items()}
    ratio = rmse["after sync"] / rmse["perfect clocks"]
    print(f"RMSE over {ok.sum()} events: after sync {rmse['after sync'] * 1e3:.3f} mm, "
          f"perfect clocks {rmse['perfect clocks'] * 1e3:.3f} mm, ratio {ratio:.3f} "
          "(goal <= 1.2)")
    if not args.keep:
        shutil.rmtree(folder)
    return 0 if ratio <= 1.2 else 1


if __name__ == "__main__":
    sys.exit(main())
