"""Tests for locate.io.filesets and locate.io.deployment: a recorder's many files on one axis.

References: the files' own samples read by libsndfile (soundfile.read) for the reads across
file boundaries; Python's datetime for clock arithmetic; the placement rules of the site-file
reference (docs/site-file.md).
"""

import datetime as dt
from pathlib import Path

import numpy as np
import pytest
import soundfile

from locate.errors import RecordingError, SiteFileError
from locate.io.audio import open_recordings
from locate.io.bext import insert_bext, pack_bext
from locate.io.filesets import FileInfo, natural_key, place_files, utc_text
from locate.io.site import load_site
from locate.io.toml import dump_toml

FS = 8000
UTC = dt.timezone.utc
T0 = dt.datetime(2026, 11, 18, 23, 59, 30)  # recorder clock (UTC)
LAYOUT = [(0.0, 0.0, 1.2), (40.0, 0.0, 1.5), (40.0, 30.0, 1.3), (0.0, 30.0, 1.2)]


def _posix(t: dt.datetime) -> tuple[int, float]:
    s = t.replace(tzinfo=UTC).timestamp()
    return int(s // 1), s - s // 1


def _info(name, n, start=None, fs=FS, res=1 / FS):
    return FileInfo(Path(name), n, fs, 1, None if start is None else _posix(start), res)


def test_stamped_files_are_placed_by_their_stamps_with_a_gap_kept():
    a = _info("R1_001.wav", 45 * FS, T0)
    b = _info("R1_002.wav", 50 * FS, T0 + dt.timedelta(seconds=45))  # back to back
    c = _info("R1_003.wav", 30 * FS, T0 + dt.timedelta(seconds=100.5))  # 5.5 s gap
    s = place_files([c, a, b])  # stamps decide the order, not the list
    assert [p.path.name for p in s.parts] == ["R1_001.wav", "R1_002.wav", "R1_003.wav"]
    assert [p.k0 for p in s.parts] == [0, 45 * FS, int(100.5 * FS)]
    assert s.gaps == ((95 * FS, int(100.5 * FS)),)
    assert s.source == "bext" and s.start == _posix(T0)


def test_overlapping_stamps_name_the_later_file():
    a = _info("R1_001.wav", 45 * FS, T0)
    b = _info("R1_002.wav", 50 * FS, T0 + dt.timedelta(seconds=44))  # 1 s inside the first
    with pytest.raises(RecordingError) as info:
        place_files([a, b])
    msg = str(info.value)
    assert info.value.field == "bext.TimeReference" and "R1_002.wav" in info.value.file
    assert "overlapping" in msg and "R1_001.wav" in msg


def test_stamps_spaced_for_another_rate():
    # 44.1 kHz audio labelled 48 kHz: 60 s files seem 55.1 s long and are stamped 60 s apart,
    # a gap of 8.8 % after each (48000 / 44100 = 1.0884).  (The other way round the files
    # overlap, refused by test_overlapping_stamps_name_the_later_file.)
    fs = 48000
    n = 60 * 44100
    files = [FileInfo(Path(f"R1_{k}.wav"), n, fs, 1, _posix(T0 + dt.timedelta(seconds=60 * k)),
                      1 / fs) for k in range(4)]
    with pytest.raises(RecordingError) as info:
        place_files(files)
    assert info.value.field == "sample rate" and "44100 Hz" in str(info.value)
    # a recorder that pauses 6 s between 60 s files (a duty cycle) is not a rate error
    files = [FileInfo(Path(f"R1_{k}.wav"), 60 * fs, fs, 1,
                      _posix(T0 + dt.timedelta(seconds=66 * k)), 1 / fs) for k in range(4)]
    assert len(place_files(files).gaps) == 3


def test_mixed_rates_within_a_recorder():
    a = _info("R1_001.wav", 45 * FS, T0)
    b = _info("R1_002.wav", 45 * 16000, T0 + dt.timedelta(seconds=45), fs=16000)
    with pytest.raises(RecordingError) as info:
        place_files([a, b])
    assert info.value.field == "sample rate" and info.value.file.endswith("R1_002.wav")


def test_unstamped_files_back_to_back_in_name_order_with_a_note():
    files = [_info(f"R1_{k}.wav", (40 + k) * FS) for k in (1, 2, 10)]
    s = place_files(files, field_name="mics[0].file")
    assert [p.k0 for p in s.parts] == [0, 41 * FS, 83 * FS]
    assert s.source == "name order" and s.start is None
    assert any("name order" in n and "no clock time" in n for n in s.notes)
    t = place_files(files, start_time=_posix(T0))
    assert t.source == "start_time" and t.start == _posix(T0)


def test_natural_order_puts_9_before_10():
    names = ["R1_10.wav", "R1_9.wav", "R1_1.wav"]
    assert sorted(names, key=natural_key) == ["R1_1.wav", "R1_9.wav", "R1_10.wav"]


def test_utc_text_rounds_across_a_second_and_midnight():
    whole, frac = _posix(dt.datetime(2026, 11, 18, 23, 59, 59))
    assert utc_text(whole, frac, 0.9996) == "2026-11-19T00:00:00.000Z"  # datetime arithmetic
    assert utc_text(whole, 0.25, 3600.5) == "2026-11-19T00:59:59.750Z"


# ------------------------------------------------------------------ files on disk, read back

def _write(path, x, fs=FS, start=None):
    soundfile.write(path, x, fs, subtype="FLOAT")
    if start is not None:
        insert_bext(path, pack_bext(start, fs))


def _deployment(tmp_path, *, gap_s=0.0, stamp=True, extra=None, zone="Z"):
    """4 recorders; R1 writes 2 files (optionally with a gap), the others one file each."""
    rng = np.random.default_rng(1)
    whole = rng.uniform(-0.5, 0.5, (4, 20 * FS)).astype(np.float32)
    mics = []
    for i in range(4):
        d = tmp_path / f"R{i + 1}"
        d.mkdir()
        if i == 0:
            n1 = 7 * FS + 123
            _write(d / "a_1.wav", whole[i, :n1], start=T0 if stamp else None)
            second = T0 + dt.timedelta(seconds=n1 / FS + gap_s)
            _write(d / "a_2.wav", whole[i, n1:], start=second if stamp else None)
        else:
            _write(d / "a_1.wav", whole[i], start=T0 if stamp else None)
        m = {"name": f"M{i + 1}", "x": LAYOUT[i][0], "y": LAYOUT[i][1], "z": LAYOUT[i][2],
             "file": f"R{i + 1}/*.wav"}
        if zone:
            m["time_zone"] = zone
        m.update((extra or {}).get(i, {}))
        mics.append(m)
    site = tmp_path / "site.toml"
    site.write_text(dump_toml({"air": {"temperature_c": 10.0, "relative_humidity": 70},
                               "mics": mics}), encoding="utf-8")
    return site, whole.astype(float)


def test_a_read_across_a_file_boundary_equals_the_recorders_samples(tmp_path):
    site, whole = _deployment(tmp_path)
    rec = open_recordings(load_site(site))
    assert rec.deployment is not None and rec.epoch == _posix(T0)
    a, b = 6.5, 8.25  # across R1's boundary at 7.015 s
    x, residual = rec.read(a, b)
    assert np.array_equal(x, whole[:, int(a * FS):int(b * FS)])  # reference: soundfile.write
    assert np.all(residual == 0.0)
    assert all(not u for u in rec.uncovered(0.0, 20.0))
    assert rec.clock_time(7.0) == "2026-11-18T23:59:37.000Z"


def test_a_gap_is_uncovered_and_not_a_dead_mic(tmp_path):
    site, whole = _deployment(tmp_path, gap_s=2.0)
    rec = open_recordings(load_site(site))
    n1 = 7 * FS + 123
    holes = rec.uncovered(5.0, 12.0)
    assert holes[0] == [(pytest.approx(n1 / FS), pytest.approx(n1 / FS + 2.0))]
    assert holes[1:] == [[], [], []]
    assert list(rec.covering(8.0, 9.0)) == [False, True, True, True]
    with pytest.raises(RecordingError) as info:  # no command computes on the gap's zeros
        rec.read(5.0, 12.0)
    assert info.value.field == "mics[0].file" and "no audio from 7.015" in str(info.value)
    x, _ = rec.read(5.0, 12.0, gaps_ok=True)  # a caller that leaves M1 out there
    assert not any("dead" in w or "silent" in w for w in rec.warnings)
    after = n1 + 2 * FS - 5 * FS  # R1's second file follows the gap
    assert np.array_equal(x[0, after:after + 100], whole[0, n1:n1 + 100])
    sub = rec.subset([1, 2, 3])
    assert sub.mic_names == ["M2", "M3", "M4"] and sub.epoch == rec.epoch


def test_unstamped_recorders_fall_back_to_name_order_with_a_note(tmp_path):
    site, whole = _deployment(tmp_path, stamp=False)
    rec = open_recordings(load_site(site))
    assert rec.epoch is None and rec.clock_time(1.0) is None
    assert any("name order" in w for w in rec.warnings)
    x, _ = rec.read(6.0, 8.0)
    assert np.array_equal(x, whole[:, 6 * FS:8 * FS])


def test_a_glob_that_matches_nothing(tmp_path):
    site, _ = _deployment(tmp_path, extra={1: {"file": "R9/*.wav"}})
    with pytest.raises(SiteFileError) as info:
        load_site(site)
    assert info.value.field == "mics[1].file" and "matches no file" in str(info.value)


def test_a_recorder_without_clock_among_stamped_ones(tmp_path):
    site, _ = _deployment(tmp_path)
    plain = tmp_path / "R3" / "a_1.wav"
    x, fs = soundfile.read(plain, dtype="float32")
    soundfile.write(plain, x, fs, subtype="FLOAT")  # rewritten without its bext chunk
    with pytest.raises(RecordingError) as info:
        open_recordings(load_site(site))
    assert info.value.field == "mics[2].start_time" and "no clock time" in str(info.value)


def test_start_time_in_the_site_places_unstamped_recorders(tmp_path):
    later = {i: {"start_time": "2026-11-18T23:59:31.5Z"} for i in (1, 2, 3)}
    later[0] = {"start_time": "2026-11-18T23:59:30Z"}
    site, _ = _deployment(tmp_path, stamp=False, extra=later)
    rec = open_recordings(load_site(site))
    assert list(rec.offsets_s) == [0.0, 1.5, 1.5, 1.5]
    assert rec.clock_time(0.0) == "2026-11-18T23:59:30.000Z"


def test_stamps_without_a_time_zone_are_read_as_utc_with_a_note(tmp_path):
    site, _ = _deployment(tmp_path, zone=None)
    rec = open_recordings(load_site(site))
    assert rec.clock_time(0.0) == "2026-11-18T23:59:30.000Z"
    assert any("no time zone" in w for w in rec.warnings)


def test_a_recorder_on_local_time(tmp_path):
    # stamps on a clock at UTC+01:00: the true UTC is an hour earlier (datetime arithmetic)
    site, _ = _deployment(tmp_path, zone="+01:00")
    rec = open_recordings(load_site(site))
    assert rec.clock_time(0.0) == "2026-11-18T22:59:30.000Z"


def test_a_start_time_that_contradicts_the_stamps(tmp_path):
    site, _ = _deployment(tmp_path, extra={1: {"start_time": "2026-11-18T23:59:35Z"}})
    with pytest.raises(RecordingError) as info:
        open_recordings(load_site(site))
    assert info.value.field == "mics[1].start_time" and "+5.000 s" in str(info.value)


def test_declared_offset_and_drift_still_apply_per_recorder(tmp_path):
    # site-file clock model (docs/site-file.md): t = offset_s + stamp offset + tau / (1 + ppm 1e-6)
    site, whole = _deployment(tmp_path, extra={1: {"offset_s": 0.25}, 2: {"drift_ppm": 100.0}})
    rec = open_recordings(load_site(site))
    assert list(rec.offsets_s) == [0.0, 0.25, 0.0, 0.0]
    x, residual = rec.read(1.0, 2.0, gaps_ok=True)
    assert np.array_equal(x[1], whole[1, int(0.75 * FS):int(1.75 * FS)])  # soundfile samples
    end = 20 * FS / (FS * (1 + 100e-6))  # recorder 3 covers 20 s of its own clock
    assert rec.uncovered(19.0, 20.0)[2] == [(pytest.approx(end, abs=1e-9), 20.0)]
