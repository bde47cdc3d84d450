"""WAV header sanity: does the file hold as much audio as its header claims?

A recorder whose battery dies, or a copy cut short, leaves a WAV file whose RIFF ``data`` chunk
size promises more bytes than follow.  libsndfile quietly reads what is there; this module lets
the audio edge say so.  Chunk layout: RIFF/WAVE (Microsoft and IBM, "Multimedia Programming
Interface and Data Specifications 1.0", 1991): "RIFF", size, "WAVE", then chunks of a 4-byte
id, a little-endian 32-bit size and the payload padded to an even length.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["wav_shortfall", "truncation_note"]

_BYTES_PER_SAMPLE = {"PCM_U8": 1, "PCM_S8": 1, "ULAW": 1, "ALAW": 1, "PCM_16": 2, "PCM_24": 3,
                     "PCM_32": 4, "FLOAT": 4, "DOUBLE": 8}
_MAX_CHUNKS = 64


def wav_shortfall(path, channels: int, subtype: str) -> tuple[int, int] | None:
    """Frames the ``data`` chunk claims and frames the file holds, if it claims more.

    Parameters
    ----------
    path : str or os.PathLike
        A file that libsndfile reads as WAV.
    channels : int
    subtype : str
        libsndfile subtype name (``soundfile.info(path).subtype``).

    Returns
    -------
    (claimed_frames, present_frames) or None
        None when the header and the file agree, for RF64/unknown layouts, for a streaming
        placeholder size (0 or 0xFFFFFFFF) and for compressed subtypes.
    """
    width = _BYTES_PER_SAMPLE.get(str(subtype))
    if width is None or channels < 1:
        return None
    p = Path(path)
    try:
        size = p.stat().st_size
        with open(p, "rb") as fh:
            if fh.read(4) != b"RIFF":
                return None
            pos = 12
            for _ in range(_MAX_CHUNKS):
                fh.seek(pos)
                head = fh.read(8)
                if len(head) < 8:
                    return None
                n = int.from_bytes(head[4:], "little")
                if head[:4] == b"data":
                    if n in (0, 0xFFFFFFFF):
                        return None
                    frame = width * channels
                    claimed, present = n // frame, max(size - pos - 8, 0) // frame
                    return (claimed, present) if claimed > present else None
                pos += 8 + n + (n & 1)
    except OSError:
        return None
    return None


def truncation_note(path, info) -> str | None:
    """A warning for a WAV shorter than its header says, or None.

    ``info`` is ``soundfile.info(path)``.
    """
    if str(info.format) != "WAV":
        return None
    got = wav_shortfall(path, int(info.channels), str(info.subtype))
    if got is None:
        return None
    claimed, present = got
    fs = float(info.samplerate)
    return (f"{Path(path).name} is shorter than its header says ({claimed / fs:.2f} s claimed, "
            f"{present / fs:.2f} s present): truncated recording (recorder stopped, copy cut "
            "short)? only the audio present is used")
