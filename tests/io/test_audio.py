"""Tests for locate.io.audio: aligned span reads, blocks, offsets, drift, checks, errors."""

import datetime as dt
import os

import numpy as np
import pytest
import soundfile

from locate.errors import OptionError, RecordingError
from locate.io.audio import check_signals, open_recordings, write_audio
from locate.io.site import load_site
from locate.io.toml import dump_toml

FS = 8000
LAYOUT = [(0.0, 0.0, 1.2), (40.0, 0.0, 1.5), (40.0, 30.0, 1.3), (0.0, 30.0, 1.2)]
US = 1e-6


def _noise(n, channels, seed=0, amp=0.3):
    return np.random.default_rng(seed).uniform(-amp, amp, (n, channels))


def _site(tmp_path, mics, *, recording="rec.wav", name="site.toml"):
    """Site file with the given per-mic extra keys; mic positions from LAYOUT."""
    d = {"air": {"temperature_c": 10.0, "relative_humidity": 70}}
    if recording:
        d["recording"] = {"file": recording}
    d["mics"] = [{"name": f"M{i + 1}", "x": x, "y": y, "z": z, **extra}
                 for i, ((x, y, z), extra) in enumerate(zip(LAYOUT, mics, strict=False))]
    p = tmp_path / name
    p.write_text(dump_toml(d), encoding="utf-8")
    return p


def _multichannel(tmp_path, n=FS * 2, channels=4, subtype="PCM_24", ext="wav", seed=0):
    x = _noise(n, channels, seed)
    path = tmp_path / f"rec.{ext}"
    soundfile.write(path, x, FS, subtype=subtype)
    return path, soundfile.read(path, dtype="float64", always_2d=True)[0]


def _rec_error(fn, field, *words, file=None):
    with pytest.raises(RecordingError) as info:
        fn()
    msg = str(info.value)
    assert info.value.field == field, msg
    if file is not None:
        assert str(file) in msg, msg
    for w in words:
        assert w in msg, msg
    return msg


@pytest.mark.parametrize("ext, subtype", [("wav", "PCM_24"), ("flac", "PCM_16"),
                                          ("wav", "FLOAT")])
def test_read_span_matches_soundfile_read_of_whole_file(tmp_path, ext, subtype):
    _, whole = _multichannel(tmp_path, ext=ext, subtype=subtype)
    channels = [3, 1, 4, 2]
    site = load_site(_site(tmp_path, [{"channel": c} for c in channels], recording=f"rec.{ext}"))
    rec = open_recordings(site)
    assert rec.sample_rate_hz == FS and rec.n_mics == 4 and rec.mic_names[0] == "M1"
    assert (rec.start_s, rec.stop_s, rec.duration_s) == (0.0, 2.0, 2.0)
    sig, res = rec.read(0.5, 0.75)
    # reference: soundfile.read of the whole file, sliced at 0.5 s .. 0.75 s
    np.testing.assert_array_equal(sig, whole[4000:6000, np.array(channels) - 1].T)
    np.testing.assert_array_equal(res, 0.0)
    assert rec.warnings == []


def test_read_touches_only_the_requested_frames(tmp_path, monkeypatch):
    _multichannel(tmp_path, n=FS * 10)
    rec = open_recordings(load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)])))
    frames = []
    real = soundfile.SoundFile.read

    def spy(self, frames_=-1, *a, **k):
        n = k.pop("frames", frames_)
        frames.append(n)
        return real(self, n, *a, **k)

    monkeypatch.setattr(soundfile.SoundFile, "read", spy)
    monkeypatch.setattr(soundfile, "read", lambda *a, **k: pytest.fail("whole-file read"))
    rec.read(3.0, 3.1)
    assert frames == [800]  # one read of 0.1 s x 8 kHz for the one multichannel file
    frames.clear()
    blocks = list(rec.blocks(1.0, 0.5, 2.0, 4.0))
    assert [b[0] for b in blocks] == [2.0, 2.5, 3.0]
    assert max(frames) == FS and len(frames) == 3


def test_blocks_tile_the_recording(tmp_path):
    _, whole = _multichannel(tmp_path, n=FS * 3 + 123)
    rec = open_recordings(load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)])))
    got = list(rec.blocks(0.5, 0.0))
    assert [round(t0, 6) for t0, *_ in got] == [0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0]
    assert got[-1][1].shape == (4, 123)  # the last block is cut at the end
    # reference: soundfile.read of the whole file
    np.testing.assert_array_equal(np.concatenate([s for _, s, _ in got], axis=1), whole.T)
    with pytest.raises(OptionError, match="overlap"):
        next(rec.blocks(0.5, 0.5))


def test_reused_block_buffers_give_the_same_samples_as_fresh_reads(tmp_path):
    # reference: Recordings.read of each span into new arrays (itself checked against
    # soundfile.read above); a late mic and an own file make the edge blocks zero-filled,
    # so stale samples in a reused buffer would show
    _multichannel(tmp_path, n=FS * 3 + 77)
    soundfile.write(tmp_path / "m4.flac", _noise(FS * 2, 1, seed=9)[:, 0], FS,
                    subtype="PCM_24")
    site = load_site(_site(tmp_path, [{"channel": 1}, {"channel": 2, "offset_s": 0.4},
                                      {"channel": 3}, {"file": "m4.flac", "offset_s": 0.9}]))
    rec = open_recordings(site)
    fresh = list(rec.blocks(0.7, 0.2, 0.0, 3.0))
    reused = [(t0, sig.copy(), res) for t0, sig, res in rec.blocks(0.7, 0.2, 0.0, 3.0,
                                                                      reuse=True)]
    assert [t for t, *_ in reused] == [t for t, *_ in fresh] and len(fresh) == 6
    for (_, a, ra), (_, b, rb) in zip(fresh, reused, strict=True):
        np.testing.assert_array_equal(a, b)
        np.testing.assert_array_equal(ra, rb)
    assert np.all(fresh[0][1][1, :int(0.4 * FS)] == 0.0)  # M2 not yet recording
    last = fresh[-1][1][3]  # the block 2.5..3.0 s; M4's file ends at 2.9 s
    assert np.all(last[int(0.4 * FS):] == 0.0) and np.all(last[:int(0.4 * FS) - 1] != 0.0)


def test_per_mic_files_and_mixed_sources(tmp_path):
    _, whole = _multichannel(tmp_path, channels=2)
    own = _noise(FS * 2, 1, seed=5)[:, 0]
    soundfile.write(tmp_path / "m3.flac", own, FS, subtype="PCM_24")
    own_ref = soundfile.read(tmp_path / "m3.flac")[0]
    soundfile.write(tmp_path / "m4.wav", own * 0.5, FS, subtype="PCM_24")
    site = load_site(_site(tmp_path, [{"channel": 2}, {"channel": 1}, {"file": "m3.flac"},
                                      {"file": "m4.wav"}]))
    sig, _ = open_recordings(site).read(1.0, 1.5)
    np.testing.assert_array_equal(sig[0], whole[8000:12000, 1])  # soundfile.read reference
    np.testing.assert_array_equal(sig[1], whole[8000:12000, 0])
    np.testing.assert_array_equal(sig[2], own_ref[8000:12000])
    assert np.max(np.abs(sig[3] - 0.5 * own[8000:12000])) < 2**-22  # PCM_24 step, 1 LSB


def test_whole_sample_offset_shifts_and_fractional_remainder_is_returned(tmp_path):
    n = FS * 2
    x = np.zeros((n, 4))
    x[8000, :] = 0.5  # one click in every channel at mic sample 8000
    soundfile.write(tmp_path / "rec.wav", x, FS, subtype="FLOAT")
    offsets = [0.0, 10 / FS, 10.3 / FS, -7.6 / FS]
    site = load_site(_site(tmp_path, [{"channel": c + 1, "offset_s": o}
                                      for c, o in enumerate(offsets)]))
    rec = open_recordings(site)
    start = 0.5
    sig, res = rec.read(start, 1.5)
    n_click = np.argmax(sig, axis=1)
    t_click = start + n_click / FS + res
    # true time of the click = mic time (1.0 s) + offset_s (the site-file definition)
    np.testing.assert_allclose(t_click, 1.0 + np.array(offsets), atol=1e-3 * US)
    assert np.all(np.abs(res) <= 0.5 / FS + 1e-15)
    np.testing.assert_allclose(res * FS, [0.0, 0.0, 0.3, 0.4], atol=1e-9)


def test_zero_fill_before_a_late_mic_starts_is_warned(tmp_path):
    _, whole = _multichannel(tmp_path)
    site = load_site(_site(tmp_path, [{"channel": 1}, {"channel": 2, "offset_s": 0.1},
                                      {"channel": 3}, {"channel": 4}]))
    rec = open_recordings(site)
    assert rec.start_s == pytest.approx(0.1) and rec.stop_s == pytest.approx(2.0)
    sig, _ = rec.read(0.0, 0.5)
    assert np.all(sig[1, :800] == 0.0)
    np.testing.assert_array_equal(sig[1, 800:], whole[:3200, 1])
    assert any('mic "M2"' in w and "filled with zeros" in w for w in rec.warnings)
    sig, _ = rec.read(1.9, 2.1)  # M2 runs on to 2.1 s, the others stop at 2.0 s
    assert np.all(sig[0, 800:] == 0.0) and np.any(sig[1, 800:] != 0.0)
    assert any('mic "M1"' in w and "past the end" in w for w in rec.warnings)


def test_start_times_define_the_common_time_base(tmp_path):
    a = _noise(FS, 1, seed=1)[:, 0]
    b = _noise(FS, 1, seed=2)[:, 0]
    for k, x in enumerate((a, b, a, b)):
        soundfile.write(tmp_path / f"m{k}.wav", x, FS, subtype="FLOAT")
    base = "2026-05-14T21:03:07"
    stamps = [f"{base}.250Z", f"{base}.500Z", f"{base}.250Z", f"{base}.3750Z"]
    site = load_site(_site(tmp_path, [{"file": f"m{k}.wav", "start_time": s}
                                      for k, s in enumerate(stamps)], recording=None))
    rec = open_recordings(site)
    np.testing.assert_allclose(rec.offsets_s, [0.0, 0.25, 0.0, 0.125], atol=1e-12)
    assert rec.start_s == pytest.approx(0.25) and rec.stop_s == pytest.approx(1.0)
    sig, res = rec.read(0.5, 0.75)
    np.testing.assert_array_equal(sig[1], b.astype(np.float32)[2000:4000])  # mic time 0.25 s
    np.testing.assert_array_equal(sig[3], b.astype(np.float32)[3000:5000])
    np.testing.assert_allclose(res, 0.0, atol=1e-12)


def test_start_times_that_do_not_overlap_are_refused(tmp_path):
    for k in range(4):
        soundfile.write(tmp_path / f"m{k}.wav", np.zeros(FS), FS)
    t0 = dt.datetime(2026, 5, 14, 21, 3, 7, tzinfo=dt.timezone.utc)
    stamps = [t0, t0, t0 + dt.timedelta(seconds=5), t0]
    site = load_site(_site(tmp_path, [{"file": f"m{k}.wav", "start_time": s}
                                      for k, s in enumerate(stamps)], recording=None))
    _rec_error(lambda: open_recordings(site), "start_time", "do not overlap", 'mic "M3"')


def test_drift_is_resampled_onto_the_common_clock(tmp_path):
    # a band-limited signal known in closed form (sum of sines below 0.8 x Nyquist), sampled
    # at each mic's own clock: mic sample k was taken at common time o + k / (fs (1 + d))
    rng = np.random.default_rng(7)
    freqs = rng.uniform(50.0, 0.8 * FS / 2, 40)
    phases = rng.uniform(0, 2 * np.pi, 40)

    def s(t):
        return 0.02 * np.sin(2 * np.pi * freqs * t[..., None] + phases).sum(axis=-1)

    drift = [0.0, 50.0, -80.0, 120.0]
    offset = [0.0, 0.0013, -0.0021, 0.0004]
    n = FS * 4
    k = np.arange(n)
    for i, (d, o) in enumerate(zip(drift, offset, strict=True)):
        soundfile.write(tmp_path / f"m{i}.wav", s(o + k / (FS * (1 + d * 1e-6))), FS,
                        subtype="FLOAT")
    site = load_site(_site(tmp_path, [{"file": f"m{i}.wav", "drift_ppm": d, "offset_s": o}
                                      for i, (d, o) in enumerate(zip(drift, offset,
                                                                     strict=True))],
                           recording=None))
    rec = open_recordings(site)
    start, stop = 2.0, 3.0
    sig, res = rec.read(start, stop)
    t = start + np.arange(sig.shape[1]) / FS
    ref = s(t[None, :] + res[:, None])  # textbook: exact values at the common-time instants
    err_db = 10 * np.log10(np.mean((sig - ref) ** 2, axis=1) / np.mean(ref**2, axis=1))
    assert np.all(err_db < -80.0), err_db
    # the same files read as if the clocks did not drift: mic 4 ends up 120 ppm x 2.5 s
    # = 0.3 ms (2.4 samples) off, which the comparison must see
    plain = load_site(_site(tmp_path, [{"file": f"m{i}.wav", "offset_s": o}
                                       for i, o in enumerate(offset)], recording=None,
                            name="nodrift.toml"))
    sig0, res0 = open_recordings(plain).read(start, stop)
    ref0 = s(t + res0[3])
    wrong_db = 10 * np.log10(np.mean((sig0[3] - ref0) ** 2) / np.mean(ref0**2))
    assert wrong_db > -10.0, wrong_db


def test_check_signals_flags_clipping_and_dead_channels():
    x = _noise(100_000, 5, seed=3).T.copy()
    names = ["A", "B", "C", "D", "E"]
    assert check_signals(x, names) == []
    x[0, 500:503] = 1.0  # three consecutive full-scale samples
    x[1, 600:602] = -1.0  # two: 0.002 % of the samples, below both limits
    x[1, 900] = 0.9995
    x[2] = 0.0
    x[3] *= 10 ** (-45 / 20)  # 45 dB below the others
    x[4, ::2000] = 0.9999  # 50 isolated full-scale samples: 0.05 % > 0.01 %
    out = check_signals(x, names)
    assert any('"A"' in w and "clipped" in w for w in out)
    assert not any('"B"' in w for w in out)
    assert any('"C"' in w and "silent" in w for w in out)
    assert any('"D"' in w and "45 dB below" in w for w in out)
    assert any('"E"' in w and "clipped" in w for w in out)
    assert len(out) == 4


def test_read_records_clipping_warning_naming_the_mic(tmp_path):
    x = _noise(FS, 4)
    x[1000:1010, 2] = 1.0
    soundfile.write(tmp_path / "rec.wav", x, FS, subtype="FLOAT")
    rec = open_recordings(load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)])))
    rec.read(0.0, 0.5)
    rec.read(0.0, 0.5)
    assert [w for w in rec.warnings if "clipped" in w] == [
        'mic "M3": 10 samples at full scale (clipped): its delays and levels are unreliable; '
        "record with less gain"]


# ----------------------------------------------------------------------------------- errors

def test_unreadable_file_is_a_recording_error(tmp_path):
    for k in range(4):
        soundfile.write(tmp_path / f"m{k}.wav", np.zeros(FS), FS)
    site = load_site(_site(tmp_path, [{"file": f"m{k}.wav"} for k in range(4)], recording=None))
    (tmp_path / "m2.wav").write_bytes(b"RIFF but not really audio")
    _rec_error(lambda: open_recordings(site), "mics[2].file", "not a readable audio file",
               "WAV or FLAC", file=tmp_path / "m2.wav")
    (tmp_path / "m2.wav").unlink()
    _rec_error(lambda: open_recordings(site), "mics[2].file", "file not found",
               file=tmp_path / "m2.wav")


def test_zero_length_file_is_refused(tmp_path):
    soundfile.write(tmp_path / "rec.wav", np.zeros((FS, 4)), FS)
    site = load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)]))
    soundfile.write(tmp_path / "rec.wav", np.zeros((0, 4)), FS)
    _rec_error(lambda: open_recordings(site), "recording.file", "zero length",
               file=tmp_path / "rec.wav")


def test_too_few_channels_after_the_site_was_loaded(tmp_path):
    soundfile.write(tmp_path / "rec.wav", np.zeros((FS, 4)), FS)
    site = load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)]))
    soundfile.write(tmp_path / "rec.wav", np.zeros((FS, 2)), FS)
    _rec_error(lambda: open_recordings(site), "mics[2].channel", "channel 3", "2 channel(s)",
               file=tmp_path / "rec.wav")


def test_mismatched_sample_rates_are_refused(tmp_path):
    for k in range(4):
        soundfile.write(tmp_path / f"m{k}.wav", np.zeros(FS), 44100 if k == 3 else FS)
    site = load_site(_site(tmp_path, [{"file": f"m{k}.wav"} for k in range(4)], recording=None))
    _rec_error(lambda: open_recordings(site), "sample rate", "44100 Hz differs from 8000 Hz",
               file=tmp_path / "m3.wav")


def test_nan_samples_in_the_span_are_refused(tmp_path):
    x = _noise(FS, 4)
    x[5000, 1] = np.nan
    soundfile.write(tmp_path / "rec.wav", x, FS, subtype="FLOAT")
    rec = open_recordings(load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)])))
    rec.read(0.0, 0.5)  # the NaN is later
    _rec_error(lambda: rec.read(0.5, 0.7), "channel 2", "NaN/inf", 'mic "M2"',
               file=tmp_path / "rec.wav")


def test_bad_spans(tmp_path):
    _multichannel(tmp_path)
    rec = open_recordings(load_site(_site(tmp_path, [{"channel": c} for c in (1, 2, 3, 4)])))
    # the library names its parameters; the CLI says --from/--to (tests/cli)
    _rec_error(lambda: rec.read(1.0, 3.0), "stop_s", "past the end", "last 2.000 s")
    _rec_error(lambda: rec.read(1.0, 1.0), "start_s", "start_s must be before stop_s")
    _rec_error(lambda: rec.read(1.5, 1.0), "start_s", "start_s must be before stop_s")
    _rec_error(lambda: rec.read(-1.0, 1.0), "start_s", "before the recordings begin")


# ------------------------------------------------------------------------------------ writer

@pytest.mark.parametrize("ext", ["wav", "flac"])
def test_write_audio_round_trips_and_is_atomic(tmp_path, ext):
    x = _noise(FS, 3).T
    p = write_audio(tmp_path / f"out.{ext}", x, FS)
    data, rate = soundfile.read(p, always_2d=True)  # soundfile as the reference reader
    assert rate == FS and data.shape == (FS, 3)
    assert soundfile.info(str(p)).format == ext.upper()
    assert np.max(np.abs(data.T - x)) <= 2**-23  # PCM_24 default: within one 24-bit step
    assert os.listdir(tmp_path) == [f"out.{ext}"]  # no temporary file left behind
    with pytest.raises(ValueError, match="full scale"):
        write_audio(tmp_path / f"out.{ext}", 4.0 * x, FS)
    np.testing.assert_array_equal(soundfile.read(p, always_2d=True)[0], data)  # untouched
    assert os.listdir(tmp_path) == [f"out.{ext}"]
    with pytest.raises(ValueError, match="extension"):
        write_audio(tmp_path / "out.mp4", x, FS)
