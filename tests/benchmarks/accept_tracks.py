"""Acceptance table of issue 16: ``tdoa track`` on invented scenes, scored against the truth.

Run on demand (minutes on 2 cores):

    nice .venv/bin/python tests/benchmarks/accept_tracks.py [FAMILY ...] [--seed N]

Each scene is simulated with the project simulator (locate.synth.simulate_moving: exact
retarded time per sample per mic), written as an invented site + WAV and tracked through the
command line with the automatic band.  Printed per scene: exit code, max horizontal error of
the points at their emission times (and as % of the range for aircraft), share of points
inside their own 95 % ellipses (chi-square 2 dof, 5.991, scipy.stats.chi2), heading error,
the flag, and the verdict against the issue's acceptance:

* vehicles: every point within 1 m, >= 85 % inside, the turn within 0.5 s;
* aircraft: horizontal error <= 1 % of the range, >= 85 % inside, heading within 2 deg;
* engine-like sources (a firing / blade-passing harmonic series falling 3 dB per harmonic plus
  broadband noise at half its amplitude) and recorded engine and propeller sounds
  (tests/data/sounds/vehicles, looped along the pass by tests/recorded_scenes.py, with ISO 9613-1
  absorption and a ground reflection of Q = 0.7, or none: ``-free``): as vehicles or
  aircraft, or flagged and covered, or refused with the reason (a band named in a refusal
  is one that gave a track);
* a forced wrong model / hard scene: tracked and meeting the above, or flagged (warning) with
  >= 85 % inside, or refused in one line with a reason - never a confident wrong track.
"""

from __future__ import annotations

import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from locate import synth  # noqa: E402
from tests import recorded_scenes as rs  # noqa: E402
from tests.cli_helpers import run, write_site  # noqa: E402
from tests.track import test_track_cli as tc  # noqa: E402


def _engine(fundamental_hz, n_harm, band, rng_seed=0):
    """An engine-like source: firing-frequency harmonics (falling 3 dB each) plus broadband."""
    harm = tuple(10 ** (-3.0 * k / 20.0) for k in range(n_harm))
    return (synth.Waveform("tone", fundamental_hz=fundamental_hz, harmonics=harm,
                           rms_pa_at_1m=1.0),
            synth.Waveform("noise", band_hz=band, rms_pa_at_1m=0.5))


def _scenes():
    """name -> (family, mics, path, t_stop, fs, snr_db, waveforms, dims, span, args)."""
    out = {}
    for name in ("beside", "through", "turn", "accel", "aircraft", "jet"):
        mics, path, t_stop, fs, snr, band, dims, span = tc._scene(name)
        fam = "aircraft" if name in ("aircraft", "jet") else "vehicle"
        out[name] = (fam, mics, path, t_stop, fs, snr, (synth.Waveform("noise", band_hz=band),),
                     dims, span, [])
    # forced straight on the turn: must be flagged (and widened) or refused
    out["turn-forced-straight"] = out["turn"][:-1] + (["--model", "straight"],)
    out["turn-forced-straight"] = ("hard",) + out["turn-forced-straight"][1:]
    for name in ("aircraft-side", "jet-offset"):  # held-out-like variants
        mics, path, t_stop, fs, snr, band, dims, span = tc._scene(name)
        out[name] = ("aircraft", mics, path, t_stop, fs, snr,
                     (synth.Waveform("noise", band_hz=band),), dims, span, [])
    # engine-like (harmonic firing frequency + broadband) bus beside the vehicle array
    d, n = tc._unit(60.0)
    cpa = tc.VEHICLE_MICS.mean(axis=0) + 24.0 * n
    cpa[2] = 1.0
    out["engine-bus"] = ("engine", tc.VEHICLE_MICS, synth.StraightPath(cpa - 100.0 * d, 12.0 * d),
                         16.0, tc.FS, 10.0, _engine(45.0, 20, (100.0, 2500.0)), 2, (1.0, 15.5),
                         ["--source-z", "1.0"])
    # engine-like propeller aircraft (blade-passing harmonics + broadband) at 450 m, mast mic
    d, n = tc._unit(300.0)
    p0 = np.array([0.0, 0.0, 450.0]) + 150.0 * n - 12.0 * 60.0 * d
    out["engine-propeller"] = ("engine", tc.AIRCRAFT_MICS, synth.StraightPath(p0, 60.0 * d),
                               24.0, 6000.0, 5.0, _engine(95.0, 12, (80.0, 2000.0)), 3,
                               (3.0, 24.0), [])
    # recorded sounds (tests/recorded_scenes.py), over reflecting ground (Q 0.7) or none
    for name in ("bus", "lorry", "propeller", "propeller_b"):
        sound, mics, path, t_stop, fs, snr, dims, span, z = rs.scene(name)
        extra = [] if z is None else ["--source-z", str(z)]
        for tag, q in (("", 0.7), ("-free", None)):
            out[f"rec-{name.replace('_', '-')}{tag}"] = (
                "recorded", mics, path, t_stop, fs, snr, (rs.recorded(sound),), dims, span,
                extra, dict(absorption=True, ground_reflection=q))
    # short span: fewer windows than a track needs -> a refusal naming the span
    for dur in (0.3, 0.6, 1.0, 1.5):
        out[f"short-span-{dur:g}s"] = ("short",) + out["beside"][1:8] + ((5.0, 5.0 + dur), [])
    return out


def _score(doc, path, mics):
    pts = doc["track"]["points"]
    t_e = np.array([p["t_emit_s"] for p in pts])
    pos = np.array([p["position_m"] for p in pts])
    cov = np.array([p["covariance_m2"] for p in pts])[:, :2, :2]
    err = (pos - path.position_m(t_e))[:, :2]
    m2 = np.einsum("wi,wij,wj->w", err, np.linalg.inv(cov), err)
    rng = np.linalg.norm(pos - mics.mean(axis=0), axis=1)
    v = path.velocity_mps(t_e)
    true_h = np.rad2deg(np.arctan2(v[:, 0], v[:, 1]))
    hd = np.array([p["heading_deg"] for p in pts])
    dh = np.abs((hd - true_h + 180.0) % 360.0 - 180.0)
    return np.linalg.norm(err, axis=1), np.mean(m2 < tc.CHI2_95_2D), rng, dh


def run_scene(name, spec, seed):
    fam, mics, path, t_stop, fs, snr, waves, dims, span, extra = spec[:10]
    sim_kw = dict(absorption=False) if len(spec) < 11 else spec[10]
    with tempfile.TemporaryDirectory() as tmp:
        sim = synth.simulate_moving(mics, path, waves, t_start_s=0.0, t_stop_s=t_stop,
                                    sample_rate_hz=fs, snr_db=snr,
                                    rng=np.random.default_rng(seed), **sim_kw)
        site = write_site(tmp, mics, sim.signals, fs, temperature_c=20.0, humidity=50.0)
        out = Path(tmp) / "t.json"
        args = ["track", site, "--from", span[0], "--to", span[1], "--json", out, "-q"]
        if dims == 3:
            args += ["--dims", "3"]
        elif "--source-z" not in extra:
            args += ["--source-z", "0.5"]
        t0 = time.time()
        code, _, stderr = run(args + list(extra))
        took = time.time() - t0
        row = {"scene": name, "family": fam, "code": code, "s": took,
               "traceback": "Traceback" in stderr}
        if code != 0:
            row["reason"] = stderr.strip().splitlines()[-1] if stderr.strip() else ""
            one_line = stderr.count("\n") == 1 and not row["traceback"]
            misleading = fam == "short" and "coherent" in row["reason"]
            row["verdict"] = ("PASS (refused: reason given)" if one_line and not misleading
                              and fam in ("short", "engine", "hard", "recorded") else "FAIL")
            return row
        doc = json.loads(out.read_text())
        tr = doc["track"]
        err, inside, rng, dh = _score(doc, path, mics)
        row.update(max_err_m=float(err.max()), max_err_pct=float(np.max(100 * err / rng)),
                   inside=float(inside), heading_err_deg=float(np.median(dh)),
                   flagged=bool(tr["flagged"]), model=tr["model"], band=tr.get("band_hz"))
        if fam == "aircraft" or (fam in ("engine", "recorded") and dims == 3):
            ok = bool(np.all(err <= 0.01 * rng) and inside >= 0.85 and np.median(dh) <= 2.0)
        else:
            ok = bool(err.max() <= 1.0 and inside >= 0.85)
        if name == "turn":
            turns = [t for t in tr["turns"] if t["is_turn"]]
            ok = ok and len(turns) == 1 and abs(turns[0]["t_s"] - 6.0) <= 0.5
        if not ok and fam in ("hard", "engine", "recorded") and tr["flagged"] and inside >= 0.85:
            row["verdict"] = "PASS (flagged, widened)"
        else:
            row["verdict"] = "PASS" if ok else "FAIL"
        return row


def main(argv):
    seed = 1
    if "--seed" in argv:
        k = argv.index("--seed")
        seed = int(argv[k + 1])
        argv = argv[:k] + argv[k + 2:]
    scenes = _scenes()
    names = argv or list(scenes)
    head = (f"{'scene':22s} {'family':8s} {'exit':>4s} {'max err':>10s} {'% range':>8s} "
            f"{'inside':>7s} {'hdg err':>8s} {'flag':>5s} {'model':>9s} {'s':>5s}  verdict")
    print(head)
    for name in names:
        r = run_scene(name, scenes[name], seed)
        if r["code"] == 0:
            print(f"{name:22s} {r['family']:8s} {r['code']:4d} {r['max_err_m']:9.3f}m "
                  f"{r['max_err_pct']:7.3f}% {100 * r['inside']:6.0f}% "
                  f"{r['heading_err_deg']:7.2f}d {str(r['flagged']):>5s} {r['model']:>9s} "
                  f"{r['s']:5.0f}  {r['verdict']}"
                  + ("" if r.get("band") is None
                     else " (band {:.0f}-{:.0f} Hz)".format(*r["band"])),
                  flush=True)
        else:
            print(f"{name:22s} {r['family']:8s} {r['code']:4d} {'-':>10s} {'-':>8s} {'-':>7s} "
                  f"{'-':>8s} {'-':>5s} {'-':>9s} {r['s']:5.0f}  {r['verdict']}: "
                  f"{r.get('reason', '')}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
