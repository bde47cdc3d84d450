"""Acceptance measurement (run on demand): two steady sources 60 m apart (issue 17).

Each trial (invented yard, 6 mics over ~50 m, 16 kHz, tests/mixtures.py): two steady sources
60 m apart at random places around the array (their midpoint within 40 m of the array
centre), of equal level, 15 dB over independent noise, 4 s; pairs broadband + broadband
(even trials) and hum + broadband (odd trials).  Runs ``tdoa fix --from 0.5 --to 3.5
--sources auto`` (locate.workflows.sources.locate_sources).  Counted per source: reported
(a fix within 1 m), with a band that matches its kind (the hum: the tonal lines; a fan: an
octave band inside 80-3000 Hz), and shown on the per-band maps (a band map standing at least
PEAK_SIGMAS incoherent deviations above its median within 1 m of it).

    python tests/benchmarks/accept_two_sources.py [--trials 10]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from locate.fix.sources import PEAK_SIGMAS  # noqa: E402
from locate.io.audio import open_recordings  # noqa: E402
from locate.io.site import load_site  # noqa: E402
from locate.synth import Waveform  # noqa: E402
from locate.workflows.sources import locate_sources  # noqa: E402
from tests.cli_helpers import write_site  # noqa: E402
from tests.mixtures import FAN, HUM, RATE, YARD, mixture  # noqa: E402

FAN2 = Waveform(kind="noise", band_hz=(200.0, 4000.0), taper_s=0.0)


def scene(rng, kind):
    centre = YARD[:, :2].mean(axis=0)
    mid = centre + rng.uniform(-40, 40, 2) * np.array([1.0, 1.0])
    ang = rng.uniform(0, np.pi)
    half = 30.0 * np.array([np.cos(ang), np.sin(ang)])
    a, b = mid - half, mid + half
    first = HUM if kind == "hum+fan" else FAN2
    return [((a[0], a[1], 1.0), first), ((b[0], b[1], 1.0), FAN)]


def shown(maps, xy):
    """Does some band map stand PEAK_SIGMAS above its median within 1 m of xy?"""
    for bm in maps:
        ix = np.abs(bm.x_m - xy[0]) <= 1.0 + abs(bm.x_m[1] - bm.x_m[0])
        iy = np.abs(bm.y_m - xy[1]) <= 1.0 + abs(bm.y_m[1] - bm.y_m[0])
        if not ix.any() or not iy.any():
            continue
        top = float(np.max(bm.power[np.ix_(iy, ix)]) - bm.floor)
        if top >= PEAK_SIGMAS * bm.sigma:
            return True
    return False


def trial(seed, folder):
    kind = "hum+fan" if seed % 2 else "fan+fan"
    rng = np.random.default_rng(3000 + seed)
    srcs = scene(rng, kind)
    sig, _ = mixture(rng, YARD, steadies=srcs, duration_s=4.0, steady_db=(0.0, 0.0),
                     noise_db=-15.0)
    site = load_site(write_site(folder, YARD, sig, RATE, temperature_c=20.0, humidity=50.0))
    try:
        result, maps = locate_sources(site, open_recordings(site), 0.5, 3.5, sources="auto",
                                      source_z_m=1.0)
        fixes = result["fixes"]
    except Exception as exc:  # noqa: BLE001 - a refusal counts as nothing reported
        print(f"trial {seed}: {type(exc).__name__}: {exc}")
        fixes, maps = [], []
    rows = []
    for pos, wf in srcs:
        d = [np.hypot(*(np.array(f["position_m"][:2]) - pos[:2])) for f in fixes]
        j = int(np.argmin(d)) if d else -1
        found = bool(d) and d[j] <= 1.0
        band_ok = False
        if found:
            f = fixes[j]
            band_ok = (f["tonal"] if wf.kind == "tone" else
                       (not f["tonal"] and f["band_hz"][0] < wf.band_hz[1]
                        and f["band_hz"][1] > wf.band_hz[0]))
        rows.append((kind, "hum" if wf.kind == "tone" else "fan", found,
                     float(d[j]) if d else np.nan, band_ok, shown(maps, pos[:2])))
    extra = len(fixes) - sum(r[2] for r in rows)
    return rows, extra


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=10)
    args = ap.parse_args(argv)
    folder = Path(tempfile.mkdtemp(prefix="tdoa17s-"))
    rows, extras = [], 0
    try:
        for s in range(args.trials):
            r, e = trial(s, folder)
            rows.extend(r)
            extras += e
            for row in r:
                print(f"trial {s} {row[0]}: {row[1]} found {row[2]} error {row[3]:.2f} m "
                      f"band ok {row[4]} on map {row[5]}")
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    for kind in ("fan+fan", "hum+fan"):
        sel = [r for r in rows if r[0] == kind]
        if not sel:
            continue
        print(f"{kind}: {len(sel)} sources; reported within 1 m "
              f"{np.mean([r[2] for r in sel]):.0%}; with its band "
              f"{np.mean([r[2] and r[4] for r in sel]):.0%}; shown on a band map "
              f"{np.mean([r[5] for r in sel]):.0%}")
    print(f"fixes that match no source: {extras}")


if __name__ == "__main__":
    main()
