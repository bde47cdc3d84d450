"""Streaming event detection: the whole-envelope rule, in bounded memory."""

import numpy as np
import pytest

from locate.io.audio import open_recordings
from locate.io.site import load_site
from locate.signal.event_scan import EventStream
from locate.signal.events import detect_events
from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import write_site
from tests.scenes import ARRAY_40M, RATE_HZ

MS = 1e-3


def _envelope(rng, n_mics=5, n_frames=12000):
    e = rng.normal(-60.0, 2.0, (n_mics, n_frames)) + np.linspace(0, rng.normal(0, 10), n_frames)
    for _ in range(int(rng.integers(5, 30))):
        a, length = int(rng.integers(0, n_frames)), int(rng.integers(1, 400))
        for k in range(n_mics):
            if rng.random() < 0.8:
                s = a + int(rng.integers(0, 30))
                e[k, s:s + length] += rng.uniform(5, 30)
    return e


@pytest.mark.parametrize("seed", range(6))
def test_stream_finds_exactly_the_events_of_the_whole_envelope(seed):
    # Reference: locate.signal.events.detect_events on the whole envelope at once.
    rng = np.random.default_rng(seed)
    e = _envelope(rng)
    kw = dict(frame_s=0.005, t0_s=3.0, threshold_db=10.0, min_mics=3, max_spread_s=0.2,
              min_gap_s=0.3, background_s=[1.0, 5.0][seed % 2], pad_s=0.05)
    ref = detect_events(e, **kw)
    stream = EventStream(len(e), **kw)
    k = 0
    while k < e.shape[1]:
        step = int(rng.integers(1, 3000))
        stream.add(e[:, k:k + step])
        k += step
    got = stream.finish()
    assert len(got) == len(ref) > 0
    for a, b in zip(ref, got):
        assert (a.t_start_s, a.t_end_s, a.level_db, a.n_mics, a.duration_s) == (
            b.t_start_s, b.t_end_s, b.level_db, b.n_mics, b.duration_s)
        assert np.array_equal(a.onset_s, b.onset_s, equal_nan=True)


def test_stream_keeps_a_bounded_envelope_however_long_the_input():
    # common practice: a streaming detector's state must not grow with the input length
    rng = np.random.default_rng(1)
    stream = EventStream(4, frame_s=0.005, background_s=5.0, max_spread_s=0.3)
    widths = []
    for _ in range(200):  # 200 x 10 s of quiet envelope
        stream.add(rng.normal(-60.0, 2.0, (4, 2000)))
        widths.append(stream.buf.shape[1])
    assert max(widths[100:]) <= max(widths[:20])
    assert max(widths) < 2 * 2000 + 2 * 1000  # two blocks plus a background segment or two


def test_streamed_scan_finds_simulated_bursts_at_their_arrival(tmp_path):
    # Reference: the exact simulator's arrival time at the nearest mic of each burst.
    rng = np.random.default_rng(4)
    wf = Waveform(kind="noise", band_hz=(300.0, 3000.0), duration_s=0.15)
    t_emit = [3.0, 11.5, 24.2]
    sim = simulate_events(ARRAY_40M, [Emission(np.array([60.0, 10.0, 1.0]), t, wf)
                                      for t in t_emit], sample_rate_hz=RATE_HZ,
                          duration_s=30.0, snr_db=25.0, rng=rng)
    site = load_site(write_site(tmp_path, ARRAY_40M, sim.signals, RATE_HZ))
    rec = open_recordings(site)
    from locate.workflows.fixing import conditions_for, scan_events
    events = scan_events(rec, site.positions_m, conditions_for(site), band_hz=(200.0, 4000.0),
                         block_s=4.0)
    assert len(events) == 3
    for ev, arr in zip(events, sim.arrivals_s):
        assert abs(np.nanmin(ev.onset_s) - np.min(arr)) < 10 * MS
