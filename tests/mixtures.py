"""Invented scenes with several sounds at once, built on the exact simulator (locate.synth).

Each component is simulated on its own without noise and the components are summed with
levels set afterwards (the simulator is linear), so every level ratio is exact:

* ``snr_db``: mean square of a bang over its ``duration_s`` at the median mic, over the
  mean square of the independent noise of each channel;
* ``steady_db``: mean square of the steady source at the median mic over that of the bang
  (0 dB: "of similar level").
"""

from __future__ import annotations

import numpy as np

from locate.synth import Emission, Waveform, simulate_events

# 6 mics over ~50 m of an invented yard (Harrow Fen works), tripod heights varied a little
YARD = np.array([[0.0, 0.0, 1.2], [50.0, 0.0, 1.5], [52.0, 40.0, 1.1], [0.0, 45.0, 1.3],
                 [25.0, 20.0, 1.0], [30.0, -10.0, 1.4]])
RATE = 16000.0
BANG = Waveform(kind="impulse", band_hz=(150.0, 4000.0), duration_s=0.25, taper_s=0.01)
FAN = Waveform(kind="noise", band_hz=(80.0, 3000.0), taper_s=0.0)
HUM = Waveform(kind="tone", fundamental_hz=100.0, harmonics=(1.0, 0.8, 0.6, 0.5, 0.4, 0.3,
                                                                0.25, 0.2), taper_s=0.0)


def steady(position_m, waveform, duration_s, c=343.0):
    """An emission that sounds at every mic over the whole recording."""
    lead = 1.0 + 200.0 / c
    return Emission(np.asarray(position_m, float), -lead,
                    Waveform(**{**waveform.__dict__, "duration_s": duration_s + 2 * lead}))


def _ms(x):
    return np.mean(x**2, axis=-1)


def mixture(rng, mics, *, bangs=(), steadies=(), duration_s=8.0, rate_hz=RATE, snr_db=15.0,
            steady_db=(), noise_db=None, walls=(), bang=BANG):
    """Sum of bangs ``[(position, t_emit)]`` and steady sources ``[(position, waveform)]``.

    Returns ``(signals, info)``: ``info`` has the bang arrivals ``(E, N)``, the sound speed and
    the rms of each component.  ``steady_db`` (one per steady source) is relative to the
    bang's mean square; without bangs it is relative to the noise (``noise_db`` then sets
    the noise relative to the first steady source).
    """
    kw = dict(sample_rate_hz=rate_hz, duration_s=duration_s, rng=rng)
    total = np.zeros((len(mics), int(round(duration_s * rate_hz))))
    info = {"arrivals_s": np.zeros((0, len(mics)))}
    ref_ms = None
    if bangs:
        sim = simulate_events(mics, [Emission(np.asarray(p, float), t, bang) for p, t in bangs],
                              walls=walls, **kw)
        info["arrivals_s"] = sim.arrivals_s
        info["sound_speed_mps"] = sim.sound_speed_mps
        # each bang's own mean square over its duration at the median mic
        n = int(round(bang.duration_s * rate_hz))
        per = []
        for e in range(len(bangs)):
            k0 = np.round(sim.arrivals_s[e] * rate_hz).astype(int)
            per.append(np.median([_ms(sim.signals[i, k0[i]:k0[i] + n])
                                  for i in range(len(mics))]))
        ref_ms = float(np.median(per))
        total += sim.signals
    for k, (pos, wf) in enumerate(steadies):
        sim = simulate_events(mics, [steady(pos, wf, duration_s)], **kw)
        info.setdefault("sound_speed_mps", sim.sound_speed_mps)
        lvl = float(np.median(_ms(sim.signals)))
        rel = steady_db[k] if k < len(steady_db) else 0.0
        if ref_ms is None:
            ref_ms = lvl / 10 ** (rel / 10)
        total += sim.signals * np.sqrt(ref_ms * 10 ** (rel / 10) / lvl)
    if ref_ms is None:
        ref_ms = 1e-6
    noise_rel = snr_db if noise_db is None else -noise_db
    sd = np.sqrt(ref_ms / 10 ** (noise_rel / 10))
    total += sd * rng.standard_normal(total.shape)
    info["noise_rms"] = sd
    return total, info
