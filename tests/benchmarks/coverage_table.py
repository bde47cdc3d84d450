"""Coverage of the 95 % ellipse by scene family: the table in docs/uncertainty.md.

Every trial is an invented scene on the exact simulator (locate.synth) run through the same
steps as ``tdoa fix`` (locate.workflows.fixing.fix_span without the file reading):
delays (locate.signal.delays), the ground-reflection term (locate.accuracy.reflections), the
declared uncertainties (locate.accuracy.budget) and the locator with its integrity test.
What the fix is told is what a consultant would write down; the truth differs from it by the
declared amounts:

* mic positions written N(0, 5 cm) off per axis (height too), declared ``position_sd_m = 0.05``;
* air temperature written N(0, 2 degC) off, declared ``temperature_sd_c = 2``;
* source height uniform in 0..2 m, fixed with the default 1 m +- 0.6 m (not given);
* a ground reflection with a coefficient uniform in 0.3..1 (hard to soft ground).

Families: recorded sounds (an impact, a dropped object, a crash, a lift machine or a cow,
recorded: tests/data/sounds/stationary, LICENSES.md there; the whole sound analysed), bursts
(a bang inside the array), wall echo (the same plus a building face 8-15 m
beyond the array, coefficient 0.5-0.9), steady source (1 s of broadband noise), far field
(a bang 1.5-3 array widths outside), 3-D with a mast mic (a seventh mic 8 m up at the
array centre, the source 0-6 m up, solved in 3-D: ``--dims 3``), tracks (a road vehicle,
8-18 m/s, 0-1 m up, tracked with ``tdoa track``'s steps - locate.track.tracker - at a stated
0.5 m +- 0.3 m: half the trials (drawn) a straight pass 0-30 m from the array centre, the others a
45-120 deg turn; 10 s of broadband sound at 8 kHz, SNR 10 dB; a trial's coverage is the share
of its track points whose ellipse holds the true position at the point's emission time).
``--exact-mics`` writes the mic positions without error and declares none (the timing part
of the ellipse alone).
Coverage = share of trials whose true horizontal position lies inside the reported 95 %
ellipse (chi-square 2 dof, 5.991, scipy.stats.chi2); a trial that gives no fix counts as
not covered.  The binomial standard error of a 95 % coverage over 200 trials is 1.5 %.

Run:  python tests/benchmarks/coverage_table.py [--trials 200] [--seed 18] [--exact-mics]
      [--family NAME ...] [--part K/N]   (tracks take ~20 s a trial: split them over
      processes with --part 0/2 and --part 1/2; the trial-weighted mean of the parts is the
      family's coverage, the same draws as one process)
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
from scipy import stats

from locate import synth
from locate.accuracy.budget import fix_with_budget
from locate.accuracy.inputs import nuisance_sds, sound_speed_slope_mps_per_c
from locate.errors import TdoaError
from locate.physics.air import sound_speed_mps
from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s
from locate.synth import Emission, Waveform, simulate_events, simulate_moving
from locate.track.tracker import track_recording
from locate.workflows.fixing import (
    ASSUMED_SOURCE_Z_M,
    ASSUMED_SOURCE_Z_SD_M,
    reflection_uncertainty,
)

RATE_HZ = 16000.0
MICS = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1], [2.0, 38.0, 1.3],
                 [20.0, 18.0, 1.6], [-4.0, 19.0, 1.4]])
TEMPERATURE_C, HUMIDITY = 12.0, 70.0
POSITION_SD_M, TEMPERATURE_SD_C = 0.05, 2.0
CHI2_95 = float(stats.chi2.ppf(0.95, 2))
FAMILIES = ("bursts, ground reflection", "wall echo", "steady source", "far field",
            "3-D, mast mic", "tracks", "recorded sounds")
SOUNDS_DIR = Path(__file__).resolve().parents[1] / "data" / "sounds" / "stationary"
_SOUNDS = {}


def recorded_sounds():
    """{name: Waveform} of the recorded sounds in tests/data/sounds/stationary (LICENSES.md)."""
    if not _SOUNDS:
        import soundfile as sf

        for f in sorted(SOUNDS_DIR.glob("*.wav")):
            x, fs = sf.read(f)
            _SOUNDS[f.stem] = synth.recorded_waveform(x, fs, rms_pa_at_1m=2.0)
    return _SOUNDS
TRACK_RATE_HZ = 8000.0
TRACK_Z_M, TRACK_Z_SD_M = 0.5, 0.3  # a road vehicle's sound: tyres to engine, 0-1 m
MAST = np.array([[20.0, 18.0, 8.0]])  # a mic 8 m up a mast at the array centre (3-D family)


def _scene(family, rng):
    """(source (3,), waveform, walls, analysed span (s, s), recording length s)."""
    z = rng.uniform(0.0, 2.0)
    if family == "3-D, mast mic":  # a source 0-6 m up (a roof vent, a balcony), solved in 3-D
        z = rng.uniform(0.0, 6.0)
    if family == "far field":
        az = rng.uniform(0, 2 * np.pi)
        r = rng.uniform(1.5, 3.0) * 40.0
        src = np.array([20.0 + r * np.sin(az), 18.0 + r * np.cos(az), z])
    else:
        src = np.array([rng.uniform(2.0, 38.0), rng.uniform(2.0, 35.0), z])
    walls = ()
    if family == "wall echo":
        side = rng.integers(4)
        d = rng.uniform(8.0, 15.0)
        point, normal = [((40.0 + d, 0, 0), (1, 0, 0)), ((-d, 0, 0), (-1, 0, 0)),
                         ((0, 38.0 + d, 0), (0, 1, 0)), ((0, -d, 0), (0, -1, 0))][side]
        walls = ((np.array(point, float), np.array(normal, float), rng.uniform(0.5, 0.9)),)
    if family == "recorded sounds":  # an impact, a machine or an animal, as recorded
        sounds = recorded_sounds()
        wave = sounds[sorted(sounds)[rng.integers(len(sounds))]]
        far = np.max(np.linalg.norm(MICS - src, axis=1)) / 330.0
        b = 0.3 + far + wave.duration_s
        return src, wave, walls, (0.3, b), b + 0.1
    if family == "steady source":
        wave = Waveform(kind="noise", band_hz=(150.0, 3000.0), duration_s=1.6, rms_pa_at_1m=1.0)
        return src, wave, walls, (0.45, 1.45), 1.8
    wave = Waveform(kind="impulse", band_hz=(150.0, 4000.0), duration_s=0.08, rms_pa_at_1m=5.0)
    far = np.max(np.linalg.norm(MICS - src, axis=1)) / 330.0
    return src, wave, walls, (0.3, 0.3 + far + 0.15), 0.3 + far + 0.3


def trial(family, rng, exact_mics=False):
    """True when the 95 % ellipse holds the truth; None when no fix was made.

    ``exact_mics``: the mic positions are written without error and no survey uncertainty is
    declared (the timing part of the ellipse alone: noise, ground reflection, source height).
    """
    src, wave, walls, (a, b), length = _scene(family, rng)
    dims = 3 if family == "3-D, mast mic" else 2
    mics = np.vstack([MICS, MAST]) if dims == 3 else MICS
    sim = simulate_events(mics, [Emission(src, 0.3 - 0.0, wave)], sample_rate_hz=RATE_HZ,
                          duration_s=length, temperature_c=TEMPERATURE_C,
                          relative_humidity=HUMIDITY, snr_db=20.0,
                          ground_reflection=rng.uniform(0.3, 1.0), walls=walls, rng=rng)
    written = mics + rng.normal(0.0, POSITION_SD_M, mics.shape)
    written[:, 2] = np.maximum(written[:, 2], 0.05)
    position_sd = POSITION_SD_M
    if exact_mics:
        written, position_sd = mics.copy(), 0.0
    t_written = TEMPERATURE_C + rng.normal(0.0, TEMPERATURE_SD_C)
    c = float(sound_speed_mps(t_written, HUMIDITY))
    pairs = all_pairs(len(mics))
    x = sim.signals[:, int(a * RATE_HZ):int(b * RATE_HZ)]
    cond = SimpleNamespace(sound_speed_mps=c, wind_mps=np.zeros(3))
    z_sd = ASSUMED_SOURCE_Z_SD_M if dims == 2 else 0.0
    sds = nuisance_sds(len(mics), position_sd_m=position_sd,
                       sound_speed_sd_mps=abs(sound_speed_slope_mps_per_c(t_written, HUMIDITY))
                       * TEMPERATURE_SD_C, temperature_sd_c=TEMPERATURE_SD_C,
                       source_height_sd_m=z_sd)
    try:
        d = estimate_delays(x, RATE_HZ, pairs=pairs, t_s=a, max_lag_s=geometric_max_lag_s(
            written, pairs, c, margin_s=5e-4))
        d = reflection_uncertainty(d, written, cond, dims=dims, source_z_m=ASSUMED_SOURCE_Z_M,
                                   source_z_sd_m=z_sd)
        models = {"source_z_m": z_sd, "sound_speed_mps": sds["sound_speed_mps"]}
        fix, _ = fix_with_budget(written, d, c, sds=sds, source_z_m=ASSUMED_SOURCE_Z_M,
                                 dims=dims, model_sds=models)
    except TdoaError:
        return None
    cov = np.asarray(fix.covariance_m2, float)[:2, :2]
    err = np.asarray(fix.position_m[:2]) - src[:2]
    if not np.all(np.isfinite(cov)):
        return True  # an unbounded ellipse (a bearing only) holds everything
    return bool(err @ np.linalg.solve(cov, err) <= CHI2_95)


def _track_path(rng):
    """(path, kind): a straight pass or (half the draws) a turn of 45-120 deg."""
    centre = MICS.mean(axis=0)
    h = rng.uniform(0.0, 2.0 * np.pi)
    d = np.array([np.sin(h), np.cos(h), 0.0])
    n = np.array([np.cos(h), -np.sin(h), 0.0])
    v = rng.uniform(8.0, 18.0)
    z = rng.uniform(0.0, 1.0)
    if rng.random() < 0.5:  # straight pass, closest approach 0-30 m from the array centre
        cpa = centre + rng.uniform(-30.0, 30.0) * n
        cpa[2] = z
        return synth.StraightPath(cpa - 5.0 * v * d, v * d), "straight"
    # a manoeuvre: in at speed v, a turn left or right at t = 5 s, out at the same speed
    turn = np.deg2rad(rng.uniform(45.0, 120.0)) * rng.choice((-1.0, 1.0))
    d2 = np.array([np.sin(h + turn), np.cos(h + turn), 0.0])
    p1 = centre + rng.uniform(-15.0, 15.0) * n
    p1[2] = z
    pts = np.array([p1 - 5.0 * v * d, p1, p1 + 5.0 * v * d2])
    return synth.WaypointPath(np.array([0.0, 5.0, 10.0]), pts), "turn"


def track_trial(rng, exact_mics=False, ground=True):
    """Share of the track's points whose 95 % ellipse holds the truth at their emission time
    (None: no track).  ``tdoa track``'s steps: locate.track.tracker.track_recording with the
    declared survey, temperature and source height (locate.track.budget)."""
    path, _ = _track_path(rng)
    wave = Waveform(kind="noise", band_hz=(150.0, 3000.0), rms_pa_at_1m=1.0)
    sim = simulate_moving(MICS, path, wave, t_start_s=0.0, t_stop_s=10.0,
                          sample_rate_hz=TRACK_RATE_HZ, temperature_c=TEMPERATURE_C,
                          relative_humidity=HUMIDITY, snr_db=10.0, absorption=False,
                          ground_reflection=rng.uniform(0.3, 1.0) if ground else None, rng=rng)
    written = MICS + rng.normal(0.0, POSITION_SD_M, MICS.shape)
    position_sd = POSITION_SD_M
    if exact_mics:
        written, position_sd = MICS.copy(), 0.0
    t_written = TEMPERATURE_C + rng.normal(0.0, TEMPERATURE_SD_C)
    c = float(sound_speed_mps(t_written, HUMIDITY))
    sds = nuisance_sds(len(MICS), position_sd_m=position_sd,
                       sound_speed_sd_mps=abs(sound_speed_slope_mps_per_c(t_written, HUMIDITY))
                       * TEMPERATURE_SD_C, temperature_sd_c=TEMPERATURE_SD_C)
    a, b = 1.0, 9.5
    x = sim.signals[:, int(a * TRACK_RATE_HZ):int(b * TRACK_RATE_HZ)]
    try:
        res = track_recording(x, TRACK_RATE_HZ, written, c, t0_s=a, source_z_m=TRACK_Z_M,
                              source_z_sd_m=TRACK_Z_SD_M, model="auto", nuisance_sds=sds)
    except TdoaError:
        return None
    err = (res.position_m - path.position_m(res.t_emit_s))[:, :2]
    cov = res.covariance_m2[:, :2, :2]
    m2 = np.einsum("wi,wij,wj->w", err, np.linalg.inv(cov), err)
    return float(np.mean(m2 <= CHI2_95))


def coverage(family, n_trials, seed, exact_mics=False, part=(0, 1)):
    """(covered share, trials, trials without a fix).

    Tracks draw every trial from its own seed (``[seed, family, trial]``), so ``part=(k, n)``
    (trials k, k + n, ...) splits the family over processes with the same draws; the shares
    of the parts, weighted by their trial counts, give the whole family's."""
    rng = np.random.default_rng([seed, FAMILIES.index(family)])
    if family == "tracks":
        hits = []
        for i in range(part[0], n_trials, part[1]):
            t0 = time.time()
            hits.append(track_trial(np.random.default_rng([seed, FAMILIES.index(family), i]),
                                    exact_mics))
            # one line per trial (stderr): a long run can be read while it goes
            print(f"  tracks trial {i}: {hits[-1]} ({time.time() - t0:.0f} s)", file=sys.stderr,
                  flush=True)
        none = sum(h is None for h in hits)
        return sum(float(h or 0.0) for h in hits) / max(len(hits), 1), len(hits), none
    else:
        hits = [trial(family, rng, exact_mics) for _ in range(n_trials)]
    none = sum(h is None for h in hits)
    return sum(float(h or 0.0) for h in hits) / n_trials, n_trials, none


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=200)
    ap.add_argument("--seed", type=int, default=18)
    ap.add_argument("--family", action="append", choices=FAMILIES)
    ap.add_argument("--exact-mics", action="store_true",
                    help="mic positions written exactly, no survey uncertainty declared")
    ap.add_argument("--part", default="0/1", metavar="K/N",
                    help="tracks only: run trials K, K+N, ... (to split over processes)")
    args = ap.parse_args(argv)
    part = tuple(int(v) for v in args.part.split("/"))
    print("| scene family | trials | 95 % ellipse coverage | no fix |")
    print("|---|---|---|---|")
    for fam in args.family or FAMILIES:
        t0 = time.time()
        cov, n, none = coverage(fam, args.trials, args.seed, args.exact_mics, part)
        print(f"| {fam} | {n} | {100 * cov:.1f} % | {none} |", flush=True)
        print(f"  ({time.time() - t0:.0f} s)", file=sys.stderr)


if __name__ == "__main__":
    main()
