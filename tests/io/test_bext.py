"""Tests for locate.io.bext: the BWF bext chunk's time stamp (EBU Tech 3285).

The chunk layout is from memory of EBU Tech 3285 (Description 256 bytes, Originator 32,
OriginatorReference 32, OriginationDate 10, OriginationTime 8, TimeReference low/high 32-bit
little-endian words, Version 2, ...).  The chunks here are built field by field with
``struct`` at those sizes, independently of :func:`locate.io.bext.pack_bext`, and libsndfile
(a reference RIFF reader) must still read the audio of a file with the chunk inserted.
"""

import datetime as dt
import struct

import numpy as np
import pytest
import soundfile

from locate.errors import RecordingError
from locate.io.bext import (
    insert_bext,
    insert_flac_bext,
    pack_bext,
    parse_bext,
    read_bext,
    read_flac_bext,
)

UTC = dt.timezone.utc


def _payload(date=b"2026-11-18", time=b"23:58:30", time_reference=0, version=1):
    """A bext payload from its fields in order (EBU Tech 3285, from memory)."""
    low, high = time_reference & 0xFFFFFFFF, time_reference >> 32
    return (b"night survey".ljust(256, b"\0") + b"R1".ljust(32, b"\0") + b"\0" * 32
            + date + time + struct.pack("<II", low, high) + struct.pack("<H", version)
            + b"\0" * 64 + b"\0" * 10 + b"\0" * 180)


def test_fields_at_their_offsets_and_a_64_bit_time_reference():
    # 13:53:20 at 96 kHz is 4.8e9 samples: more than 2**32, so the high word is 1
    tr = 50000 * 96000
    b = parse_bext(_payload(date=b"2026-05-14", time=b"13:53:20", time_reference=tr))
    assert len(_payload()) == 602  # fixed part of a version 1 chunk (EBU Tech 3285)
    assert b.date == dt.date(2026, 5, 14) and b.time_s == 13 * 3600 + 53 * 60 + 20
    assert b.time_reference == tr and tr >> 32 == 1 and b.version == 1
    whole, frac = b.start(96000)
    assert whole == int(dt.datetime(2026, 5, 14, 13, 53, 20, tzinfo=UTC).timestamp())
    assert frac == 0.0


def test_pack_bext_matches_the_field_by_field_chunk():
    when = dt.datetime(2026, 11, 18, 23, 58, 30, 250000)
    fs = 8000
    tr = (23 * 3600 + 58 * 60 + 30) * fs + 2000  # .25 s at 8 kHz
    chunk = pack_bext(when, fs, description="night survey", originator="R1")
    assert chunk[:4] == b"bext" and struct.unpack("<I", chunk[4:8])[0] == 602
    assert chunk[8:] == _payload(time_reference=tr)


def test_sub_second_start_from_time_reference():
    fs = 48000
    tr = (21 * 3600 + 3 * 60 + 7) * fs + 12000  # 21:03:07.250
    whole, frac = parse_bext(_payload(date=b"2026-05-14", time=b"21:03:07",
                                      time_reference=tr)).start(fs)
    assert whole == int(dt.datetime(2026, 5, 14, 21, 3, 7, tzinfo=UTC).timestamp())
    assert frac == pytest.approx(0.25, abs=1e-12)


def test_a_sample_count_before_midnight_in_a_file_dated_after_it():
    # the file was created at 00:00:01 on the 19th; its first sample was counted at 23:59:59.5
    fs = 8000
    tr = int((86400 - 0.5) * fs)
    whole, frac = parse_bext(_payload(date=b"2026-11-19", time=b"00:00:01",
                                      time_reference=tr)).start(fs)
    start = dt.datetime.fromtimestamp(whole + frac, tz=UTC)
    assert start == dt.datetime(2026, 11, 18, 23, 59, 59, 500000, tzinfo=UTC)


def test_time_reference_counted_at_another_rate_is_refused():
    # a 44.1 kHz file whose stamp was counted at 48 kHz reads as a time 8.8 % later
    tr = (2 * 3600) * 48000
    b = parse_bext(_payload(date=b"2026-05-14", time=b"02:00:00", time_reference=tr))
    with pytest.raises(RecordingError) as info:
        b.start(44100, file="R1_001.wav")
    assert info.value.field == "bext.TimeReference"
    assert "48000 Hz" in str(info.value) and "R1_001.wav" in str(info.value)


def test_inserted_chunk_is_read_back_and_libsndfile_still_reads_the_audio(tmp_path):
    fs = 8000
    x = np.random.default_rng(0).uniform(-0.5, 0.5, 3000).astype(np.float32)
    p = tmp_path / "R1_001.wav"
    soundfile.write(p, x, fs, subtype="FLOAT")
    assert read_bext(p) is None
    when = dt.datetime(2026, 11, 18, 23, 59, 10, 125000)
    insert_bext(p, pack_bext(when, fs))
    y, rate = soundfile.read(p, dtype="float32")  # reference RIFF reader: libsndfile
    assert rate == fs and np.array_equal(x, y)
    whole, frac = read_bext(p).start(fs)
    assert dt.datetime.fromtimestamp(whole + frac, tz=UTC) == when.replace(tzinfo=UTC)


@pytest.mark.parametrize("payload, field", [
    (_payload()[:300], "bext"),
    (_payload(date=b"2026-13-40"), "bext.OriginationDate"),
    (_payload(date=b"\0" * 10), "bext.OriginationDate"),
    (_payload(time=b"25:61:00"), "bext.OriginationTime"),
])
def test_corrupt_chunks_name_the_field(payload, field):
    with pytest.raises(RecordingError) as info:
        parse_bext(payload, file="R2_004.wav")
    assert info.value.field == field
    assert "R2_004.wav" in str(info.value) and "\n" not in str(info.value)


def test_chunk_running_past_the_end_of_the_file(tmp_path):
    p = tmp_path / "cut.wav"
    soundfile.write(p, np.zeros(100, np.float32), 8000, subtype="FLOAT")
    insert_bext(p, pack_bext(dt.datetime(2026, 1, 1, 1, 0, 0), 8000))
    data = p.read_bytes()
    p.write_bytes(data[:12 + 8 + 400])  # cut inside the bext chunk
    with pytest.raises(RecordingError) as info:
        read_bext(p)
    assert info.value.field == "bext"


def test_a_flac_file_keeps_the_stamp_in_a_riff_application_block(tmp_path):
    # FLAC metadata layout from memory (xiph.org format description); libsndfile, a reference
    # FLAC decoder, must still read the audio with the block inserted
    fs = 16000
    x = np.round(np.random.default_rng(2).uniform(-0.5, 0.5, 4000) * 32767) / 32768
    p = tmp_path / "R1_001.flac"
    soundfile.write(p, x, fs, subtype="PCM_16")
    assert read_flac_bext(p) is None
    when = dt.datetime(2026, 11, 19, 0, 0, 2, 500000)
    insert_flac_bext(p, pack_bext(when, fs))
    y, rate = soundfile.read(p)
    assert rate == fs and np.array_equal(x, y)
    whole, frac = read_flac_bext(p).start(fs)
    assert dt.datetime.fromtimestamp(whole + frac, tz=UTC) == when.replace(tzinfo=UTC)
