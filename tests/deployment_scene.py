"""A simulated field deployment on disk: recorders that write many bext-stamped files.

Invented scene: recorders (one mono mic each) start seconds apart and write consecutive files
of 45-60 s, each stamped with its start in a BWF ``bext`` chunk (:func:`locate.io.bext.pack_bext`).
Bangs come from :mod:`locate.synth` (exact simulator): each is simulated in a short window on
every recorder's clock (synth clock model: sample n of mic i is at true time n / fs + offset_i)
and written over the background noise.  Files can be left out (a battery change: a gap).
Long recorders are written block by block (memory: one block per mic).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import soundfile

from locate import synth
from locate.io.bext import insert_bext, pack_bext
from tests.field_scene import site_dict, write_site

GAIN = 0.02  # full scale per pascal
MICS5_M = np.array([[0.0, 0.0, 1.5], [58.0, 6.0, 1.3], [62.0, 55.0, 1.8], [4.0, 60.0, 1.4],
                    [30.0, 28.0, 2.4]])
BASE = dt.datetime(2026, 11, 18, 23, 57, 0)  # the deployment crosses midnight (UTC)


def bang(rms_pa_at_1m=20.0):
    return synth.Waveform(kind="impulse", band_hz=(150.0, 3000.0), duration_s=0.1,
                          rms_pa_at_1m=rms_pa_at_1m)


@dataclass
class Scene:
    folder: Path
    site: Path
    fs: int
    starts_s: np.ndarray  # true start of each recorder after BASE, s (whole samples)
    files: list  # per recorder: list of (path or None if left out, k0, n)
    emissions: list
    arrivals_s: np.ndarray  # (E, N) true arrival after BASE
    notes: dict = field(default_factory=dict)

    def boundaries_s(self, i):
        """True times (after BASE) where recorder i's files meet."""
        return [self.starts_s[i] + k0 / self.fs for _, k0, _ in self.files[i][1:]]

    def covered(self, i, t_s):
        for p, k0, n in self.files[i]:
            a = self.starts_s[i] + k0 / self.fs
            if p is not None and a <= t_s < a + n / self.fs:
                return True
        return False


def file_lengths(rng, total_s, fs, lo_s=45.0, hi_s=60.0):
    """Whole-sample file lengths drawn from [lo_s, hi_s] until ``total_s`` is covered."""
    out, t = [], 0
    while t < total_s * fs:
        n = int(rng.integers(int(lo_s * fs), int(hi_s * fs)))
        out.append(n)
        t += n
    return out


def plan_files(*, fs=8000, duration_s=400.0, starts_s=(0.0, 3.2, 7.9, 1.4, 5.6), seed=7,
               file_s=(45.0, 60.0)):
    """(starts (N,) whole samples, lengths per recorder): the files before they are written."""
    rng = np.random.default_rng(seed)
    starts = np.round(np.asarray(starts_s, float) * fs) / fs
    return starts, [file_lengths(rng, duration_s - s, fs, *file_s) for s in starts]


def write_deployment(folder, *, fs=8000, duration_s=400.0, starts_s=(0.0, 3.2, 7.9, 1.4, 5.6),
                     bang_times_s=None, positions_m=None, drop=((2, 3),), stamp=True,
                     noise_fs=2e-4, seed=7, temperature_c=8.0, block_s=60.0,
                     subtype="PCM_16", mics_m=MICS5_M, window_s=0.9, file_s=(45.0, 60.0),
                     progress=None, bang_pa=20.0):
    """Write the recorders' files and a site file ``site.toml`` naming them by glob.

    Parameters
    ----------
    starts_s : true start of each recorder after ``BASE`` (rounded to whole samples)
    bang_times_s, positions_m : emission times (after BASE) and positions (E, 3)
    drop : pairs (recorder, file index) left out (the recorder was off)
    bang_pa : rms pressure of each bang at 1 m, Pa
    stamp : write bext chunks (else plain WAVs)
    """
    folder = Path(folder)
    n_mic = len(mics_m)
    starts, plan = plan_files(fs=fs, duration_s=duration_s, starts_s=starts_s, seed=seed,
                              file_s=file_s)
    emissions = [synth.Emission(np.asarray(p, float), float(t), bang(bang_pa))
                 for t, p in zip(bang_times_s, positions_m)]
    windows = []
    arrivals = np.zeros((len(emissions), n_mic))
    for e, ev in enumerate(emissions):
        n0 = np.floor((ev.t_emit_s - starts) * fs).astype(np.int64) - int(0.05 * fs)
        off_w = starts + n0 / fs
        sim = synth.simulate_events(mics_m, [ev], sample_rate_hz=fs, duration_s=window_s,
                                    temperature_c=temperature_c, relative_humidity=60.0,
                                    clock_offsets_s=off_w, noise_rms=noise_fs / GAIN,
                                    rng=np.random.default_rng([seed, 1000 + e]))
        windows.append((n0, sim.signals * GAIN))
        arrivals[e] = sim.arrivals_s[0]
    files = []
    for i in range(n_mic):
        d = folder / f"R{i + 1}"
        d.mkdir(parents=True, exist_ok=True)
        lengths = plan[i]
        nrng = np.random.default_rng([seed, i])
        k0, mine = 0, []
        for j, n in enumerate(lengths):
            keep = (i, j) not in set(drop)
            path = d / f"R{i + 1}_{j + 1:03d}.wav" if keep else None
            if keep:
                with soundfile.SoundFile(str(path), "w", samplerate=fs, channels=1,
                                         subtype=subtype) as f:
                    for a in range(k0, k0 + n, int(block_s * fs)):
                        b = min(a + int(block_s * fs), k0 + n)
                        x = noise_fs * nrng.standard_normal(b - a)
                        for w0, sig in windows:
                            lo, hi = max(a, w0[i]), min(b, w0[i] + sig.shape[1])
                            if hi > lo:
                                x[lo - a:hi - a] = sig[i, lo - w0[i]:hi - w0[i]]
                        assert np.max(np.abs(x)) < 1.0
                        f.write(x.astype(np.float32))
                if stamp:
                    when = BASE + dt.timedelta(seconds=float(starts[i] + k0 / fs))
                    insert_bext(path, pack_bext(when, fs, originator=f"R{i + 1}"))
            else:
                nrng.standard_normal(n)  # the same noise stream as with the file kept
            mine.append((path, k0, n))
            k0 += n
            if progress is not None:
                progress(i, j, len(lengths))
        files.append(mine)
    raw = site_dict(mics_m, temperature_c=temperature_c, relative_humidity=60.0,
                    mic_files=[f"R{i + 1}/*.wav" for i in range(n_mic)],
                    title="Saltmarsh yard - night bangs (invented)")
    for m in raw["mics"]:
        m["time_zone"] = "Z"
    site = write_site(folder / "site.toml", raw)
    return Scene(folder, site, fs, starts, files, emissions, arrivals)


def utc_of(seconds_after_base: float) -> dt.datetime:
    return (BASE + dt.timedelta(seconds=float(seconds_after_base))).replace(tzinfo=dt.timezone.utc)


def parse_utc(text: str) -> dt.datetime:
    return dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
