"""Broadcast Wave (BWF) ``bext`` chunk: when did a recorder's file start?

Field recorders that write many consecutive files stamp each with its start in the RIFF
``bext`` chunk of EBU Tech 3285 ("Specification of the Broadcast Wave Format", v2, 2011).
Layout of the chunk payload (from memory of EBU Tech 3285, cross-checked by the tests against
a chunk built field by field at the offsets below and read back by libsndfile):

=========================  ======  ==========================================================
field                      offset  bytes
=========================  ======  ==========================================================
Description                0       256 ASCII
Originator                 256     32 ASCII
OriginatorReference        288     32 ASCII
OriginationDate            320     10 ASCII ``yyyy-mm-dd`` (any of ``-_:. /`` as separator)
OriginationTime            330     8 ASCII ``hh:mm:ss``
TimeReferenceLow           338     4, little-endian unsigned: low 32 bits of ...
TimeReferenceHigh          342     4: ... the first sample's count since midnight
Version                    346     2
UMID, loudness, reserved   348     254 (to 602); then CodingHistory (variable)
=========================  ======  ==========================================================

TimeReference counts samples at the file's own sample rate, so the start of the file is the
OriginationDate's midnight plus ``TimeReference / fs`` (to the sample).  The date belongs to
the OriginationTime; a file whose TimeReference lies just before midnight while its
OriginationTime lies just after (or the reverse) started on the neighbouring day.  BWF times
carry no time zone: the recorder's clock is taken as the site file says (``time_zone``).

Nothing here opens audio with libsndfile: the RIFF walk is done by hand (RIFF layout: Microsoft
and IBM, "Multimedia Programming Interface and Data Specifications 1.0", 1991).  A FLAC file
carries a WAV's ``bext`` chunk when it was encoded keeping the foreign RIFF metadata: each RIFF
chunk then sits in an APPLICATION metadata block (type 2) whose 4-byte application id is
``riff`` (FLAC format description, xiph.org, from memory: the ``fLaC`` marker, then blocks of a
1-byte header - last-block flag and 7-bit type - a 24-bit big-endian length and the payload).
"""

from __future__ import annotations

import datetime as _dt
import re
import struct
from dataclasses import dataclass
from pathlib import Path

from locate.errors import RecordingError

__all__ = ["BextStamp", "read_bext", "read_flac_bext", "parse_bext", "pack_bext", "insert_bext",
           "insert_flac_bext",
           "BEXT_MIN_BYTES", "BEXT_SIZE"]

BEXT_MIN_BYTES = 346  # up to the end of TimeReferenceHigh (fields before Version)
BEXT_SIZE = 602  # the fixed part of a version 1/2 chunk (EBU Tech 3285)
_MAX_CHUNKS = 256
_DATE = re.compile(r"(\d{4})[-_:. /](\d{2})[-_:. /](\d{2})")
_TIME = re.compile(r"(\d{2})[-_:. /](\d{2})[-_:. /](\d{2})")
_DAY_S = 86400
ORIGIN_AGREE_S = 2.0  # OriginationTime and TimeReference / fs may differ by this much


@dataclass(frozen=True)
class BextStamp:
    """The timing fields of a ``bext`` chunk.

    Attributes
    ----------
    date : datetime.date
        OriginationDate.
    time_s : int
        OriginationTime, seconds after midnight.
    time_reference : int
        First sample's count since midnight, at the file's sample rate.
    version : int or None
    """

    date: _dt.date
    time_s: int
    time_reference: int
    version: int | None = None

    def start(self, sample_rate_hz: float, file=None) -> tuple[int, float]:
        """Start of the file as (whole seconds since the date's midnight epoch, fraction).

        The whole seconds are POSIX seconds of the recorder's clock read as UTC (add the zone
        offset to get true UTC).  Raises :class:`RecordingError` when TimeReference and
        OriginationTime disagree by more than ``ORIGIN_AGREE_S`` in a way that a wrong sample
        rate explains (the stamps contradict the rate).
        """
        fs = int(round(sample_rate_hz))
        whole, rem = divmod(int(self.time_reference), fs)
        day = _dt.datetime(self.date.year, self.date.month, self.date.day,
                           tzinfo=_dt.timezone.utc)
        midnight = int(day.timestamp())
        if self.time_reference == 0 and self.time_s != 0:
            return midnight + self.time_s, 0.0  # no sample count: the whole-second time
        diff = whole - self.time_s
        if diff > _DAY_S / 2:  # counted before midnight, file dated the day after
            whole -= _DAY_S
        elif diff < -_DAY_S / 2:
            whole += _DAY_S
        diff = whole - self.time_s
        if abs(diff) > ORIGIN_AGREE_S and self.time_s > 60:
            ratio = (whole + rem / fs) / self.time_s
            rate = fs * ratio
            raise RecordingError(
                f"bext TimeReference {self.time_reference} samples is "
                f"{_clock(whole)} at the file's {fs} Hz, but OriginationTime is "
                f"{_clock(self.time_s)}: the stamps were counted at about {rate:.0f} Hz, a rate "
                "that contradicts the file's; fix the recorder's sample rate setting or give "
                "start_time in the site file", file=file, field="bext.TimeReference")
        return midnight + whole, rem / fs


def _clock(s) -> str:
    s = int(s) % _DAY_S
    return f"{s // 3600:02d}:{s // 60 % 60:02d}:{s % 60:02d}"


def _text(b: bytes) -> str:
    return b.split(b"\0", 1)[0].decode("ascii", errors="replace").strip()


def parse_bext(payload: bytes, file=None) -> BextStamp:
    """The timing fields of a ``bext`` chunk's payload (bytes after the 8-byte header).

    Raises
    ------
    RecordingError
        The chunk is too short or a field is not a date/time (field ``bext.<name>``).
    """
    if len(payload) < BEXT_MIN_BYTES:
        raise RecordingError(f"the bext chunk holds {len(payload)} bytes, fewer than the "
                             f"{BEXT_MIN_BYTES} of its fixed fields (EBU Tech 3285): the chunk "
                             "is corrupt; give start_time in the site file instead",
                             file=file, field="bext")
    date_text, time_text = _text(payload[320:330]), _text(payload[330:338])
    m = _DATE.fullmatch(date_text)
    try:
        if not m:
            raise ValueError
        date = _dt.date(int(m[1]), int(m[2]), int(m[3]))
    except ValueError:
        raise RecordingError(f"bext OriginationDate {date_text!r} is not a date yyyy-mm-dd: the "
                             "chunk is corrupt or the recorder's clock was not set",
                             file=file, field="bext.OriginationDate") from None
    m = _TIME.fullmatch(time_text)
    if not m or int(m[1]) > 23 or int(m[2]) > 59 or int(m[3]) > 60:
        raise RecordingError(f"bext OriginationTime {time_text!r} is not a time hh:mm:ss: the "
                             "chunk is corrupt", file=file, field="bext.OriginationTime")
    time_s = 3600 * int(m[1]) + 60 * int(m[2]) + min(int(m[3]), 59)
    low, high = struct.unpack_from("<II", payload, 338)
    version = struct.unpack_from("<H", payload, 346)[0] if len(payload) >= 348 else None
    return BextStamp(date, time_s, (high << 32) | low, version)


def read_bext(path) -> BextStamp | None:
    """The ``bext`` stamp of a WAV file, or None when it has none (or is not RIFF/WAVE).

    Raises
    ------
    RecordingError
        A ``bext`` chunk that is cut short or holds no valid date/time; a RIFF chunk list
        that runs past the end of the file before the audio.
    """
    p = Path(path)
    size = p.stat().st_size
    with open(p, "rb") as fh:
        head = fh.read(12)
        if len(head) < 12 or head[:4] not in (b"RIFF", b"RF64", b"BW64") or head[8:] != b"WAVE":
            return None
        pos = 12
        for _ in range(_MAX_CHUNKS):
            fh.seek(pos)
            ch = fh.read(8)
            if len(ch) < 8:
                return None
            cid, n = ch[:4], int.from_bytes(ch[4:], "little")
            if cid == b"bext":
                if pos + 8 + n > size:
                    raise RecordingError(f"the bext chunk claims {n} bytes but the file ends "
                                         f"{size - pos - 8} bytes after its start: the chunk is "
                                         "corrupt (file cut short?)", file=p, field="bext")
                return parse_bext(fh.read(n), file=p)
            if cid == b"data":
                return None  # the stamp comes before the audio in every recorder we know
            pos += 8 + n + (n & 1)
    return None


def read_flac_bext(path) -> BextStamp | None:
    """The ``bext`` stamp a FLAC file keeps in a ``riff`` APPLICATION block, or None.

    Raises
    ------
    RecordingError
        A metadata block that runs past the end of the file, or a corrupt ``bext`` chunk.
    """
    p = Path(path)
    size = p.stat().st_size
    with open(p, "rb") as fh:
        if fh.read(4) != b"fLaC":
            return None
        pos = 4
        for _ in range(_MAX_CHUNKS):
            fh.seek(pos)
            head = fh.read(4)
            if len(head) < 4:
                return None
            last, kind = head[0] >> 7, head[0] & 0x7F
            n = int.from_bytes(head[1:], "big")
            if pos + 4 + n > size:
                raise RecordingError(f"a FLAC metadata block claims {n} bytes past the end of "
                                     "the file: the file is corrupt", file=p, field="bext")
            if kind == 2 and n >= 12:
                block = fh.read(n)
                if block[:4] == b"riff" and block[4:8] == b"bext":
                    m = int.from_bytes(block[8:12], "little")
                    if 12 + m > n:
                        raise RecordingError(f"the bext chunk claims {m} bytes but its FLAC "
                                             f"block holds {n - 12}: the chunk is corrupt",
                                             file=p, field="bext")
                    return parse_bext(block[12:12 + m], file=p)
            if last:
                return None
            pos += 4 + n
    return None


def insert_flac_bext(path, chunk: bytes) -> None:
    """Put a ``bext`` chunk into a FLAC file as a ``riff`` APPLICATION block (test scenes)."""
    from locate.common import atomic_target

    p = Path(path)
    data = p.read_bytes()
    if data[:4] != b"fLaC":
        raise ValueError(f"{p} is not a FLAC file")
    head = data[4]
    n = int.from_bytes(data[5:8], "big")  # STREAMINFO, always first
    last = head >> 7
    block = b"riff" + chunk
    new_head = bytes([(head & 0x7F)]) + data[5:8]  # STREAMINFO is no longer the last
    app = bytes([(0x80 if last else 0) | 2]) + len(block).to_bytes(3, "big") + block
    with atomic_target(p, suffix=".flac") as tmp:
        tmp.write_bytes(data[:4] + new_head + data[8:8 + n] + app + data[8 + n:])


def pack_bext(when: _dt.datetime, sample_rate_hz: int, *, description="", originator="",
              time_reference=None) -> bytes:
    """A version-1 ``bext`` chunk (header and payload) stamping a file that starts at ``when``.

    ``when`` is naive or UTC clock time on the recorder; TimeReference is its sample count since
    midnight at ``sample_rate_hz`` (rounded), unless given.  Used to make test scenes.
    """
    fs = int(sample_rate_hz)
    midnight = when.replace(hour=0, minute=0, second=0, microsecond=0)
    if time_reference is None:
        time_reference = int(round((when - midnight).total_seconds() * fs))
    payload = bytearray(BEXT_SIZE)
    payload[0:256] = description.encode("ascii")[:256].ljust(256, b"\0")
    payload[256:288] = originator.encode("ascii")[:32].ljust(32, b"\0")
    payload[320:330] = when.strftime("%Y-%m-%d").encode("ascii")
    payload[330:338] = when.strftime("%H:%M:%S").encode("ascii")
    struct.pack_into("<IIH", payload, 338, time_reference & 0xFFFFFFFF, time_reference >> 32, 1)
    return b"bext" + struct.pack("<I", len(payload)) + bytes(payload)


def insert_bext(path, chunk: bytes) -> None:
    """Put a ``bext`` chunk (from :func:`pack_bext`) into a RIFF/WAVE file, before its chunks.

    Rewrites ``path`` in place through a temporary file; the RIFF size is updated.  Used to make
    test scenes (a recorder writes the chunk itself).
    """
    from locate.common import atomic_target

    p = Path(path)
    with open(p, "rb") as fh:
        head = fh.read(12)
        if head[:4] != b"RIFF" or head[8:] != b"WAVE":
            raise ValueError(f"{p} is not a RIFF/WAVE file")
        riff = int.from_bytes(head[4:8], "little")
        with atomic_target(p, suffix=".wav") as tmp, open(tmp, "wb") as out:
            out.write(b"RIFF" + struct.pack("<I", riff + len(chunk)) + b"WAVE" + chunk)
            while True:
                buf = fh.read(1 << 20)
                if not buf:
                    break
                out.write(buf)
