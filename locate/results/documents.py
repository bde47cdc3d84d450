"""Result files: schema ``tdoa-result/1`` (JSON), CSV and GeoJSON, written atomically.

The JSON schema is stable (other tools read it); extra keys are allowed.  Every write goes to
a temporary file in the target folder and is renamed over the target in one step, so a crash
or Ctrl-C never leaves a half-written result, and an input file is never overwritten.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import os
import stat
from pathlib import Path

import numpy as np

import locate.common as common
from locate.common import format_length, write_atomic
from locate.errors import OptionError, ResultFileError, TdoaError
from locate.geometry.ellipses import ellipse

__all__ = [
    "SCHEMA",
    "CAUTIONS",
    "write_atomic",
    "fix_label",
    "write_json",
    "read_result",
    "check_result_fields",
    "reading_result",
    "fix_to_dict",
    "fixes_csv",
    "check_output_path",
    "check_output_paths",
    "same_file",
    "jsonable",
]

SCHEMA = "tdoa-result/1"

CAUTIONS = (
    "Positions and levels are estimates with stated uncertainties, not a compliance "
    "measurement.",
    "Decisions about noise nuisance, safety near machinery, road or air traffic must follow the "
    "local code and the practice of a competent, licensed person.",
    "Recording people (speech) may be regulated where you work: check before deploying "
    "recorders.",
)


def same_file(a, b) -> bool:
    """True when paths ``a`` and ``b`` name one file: equal after resolving symlinks and
    ``..`` (even when ``a`` does not exist yet), or hard links to one inode."""
    try:
        if os.path.realpath(a) == os.path.realpath(b):
            return True
        return os.path.exists(a) and os.path.exists(b) and os.path.samefile(a, b)
    except (OSError, ValueError):
        return False


def check_output_path(path, inputs=(), *, option="--json"):
    """Refuse an output path whose folder is missing, that is a folder, or that would
    overwrite an input (the same file after symlinks and ``..``, or a hard link to it)."""
    if path is None:
        return None
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        what = "is a file, not a folder" if parent.exists() else "does not exist"
        raise OptionError(f"the folder {str(parent)!r} {what}: create it first",
                          file=str(p), field=option)
    if p.is_dir():
        raise OptionError("is a folder: give a file name for the output", file=str(p),
                          field=option)
    if p.exists() and not p.is_file():  # renaming over a device or pipe would replace it
        raise OptionError("is a device, pipe or socket, not a file: give a file name for the "
                          "output", file=str(p), field=option)
    for inp in inputs:
        if inp is not None and same_file(p, inp):
            raise OptionError(f"this is one of the input files ({inp}): choose another output "
                              "path (inputs are never overwritten)", file=str(p), field=option)
    return p


def check_output_paths(outputs, inputs=()):
    """:func:`check_output_path` for every ``(option, path)`` of ``outputs`` (a dict or pairs),
    and refuse two outputs of one run that name the same file."""
    pairs = [(opt, p) for opt, p in (outputs.items() if isinstance(outputs, dict) else outputs)
             if p is not None]
    for k, (opt, p) in enumerate(pairs):
        check_output_path(p, inputs, option=opt)
        for opt2, p2 in pairs[:k]:
            if same_file(p, p2):
                raise OptionError(f"is also the {opt2} output of this run: give each output its "
                                  "own file", file=str(p), field=opt)
    return [Path(p) for _, p in pairs]


def jsonable(obj):
    """Numpy arrays and scalars to plain lists/floats; NaN and inf to None."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


class _ReadyOneByOne(list):
    """A long list of the document whose items are made JSON-ready (:func:`jsonable`) one at a
    time while they are written, so that no converted copy of the whole list is held."""

    def __iter__(self):
        return (jsonable(v) for v in super().__iter__())


def _ready_for_stream(obj):
    """``jsonable(obj)``, except that its lists of entries stay lists of the original items,
    converted as the encoder reaches each (same text)."""
    if isinstance(obj, dict):
        return {str(k): _ready_for_stream(v) for k, v in obj.items()}
    if isinstance(obj, list) and len(obj) > 16 and all(isinstance(v, dict) for v in obj):
        return _ReadyOneByOne(obj)
    return jsonable(obj)


def write_json(path, obj, *, indent=1) -> Path:
    """Write ``obj`` as JSON (indented; ``indent=None``: compact and much faster), atomically.

    The text is streamed to the temporary file (``json.JSONEncoder.iterencode``), entry by
    entry: the same text as ``json.dumps(jsonable(obj), indent=indent)``, without the whole
    document as a string and a converted copy of it in memory (thousands of windows' fixes).
    """
    if indent is None:  # compact: the C encoder, which reads lists directly (no streaming)
        return write_atomic(path, json.dumps(jsonable(obj), indent=None, allow_nan=False)
                            + "\n")
    encoder = json.JSONEncoder(indent=indent, allow_nan=False)
    # through the module, so every output of a command goes through the one atomic_target
    with common.atomic_target(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        for chunk in encoder.iterencode(_ready_for_stream(obj)):
            fh.write(chunk)
        fh.write("\n")
    return Path(path)


def _read_regular(p: Path) -> bytes:
    """The bytes of a regular file; a folder, pipe or device is refused before opening."""
    try:
        info = os.stat(p)
    except FileNotFoundError:
        raise ResultFileError("file not found", file=p) from None
    except OSError as exc:
        raise ResultFileError(f"cannot read the file ({exc.strerror})", file=p) from None
    if stat.S_ISDIR(info.st_mode):
        raise ResultFileError("is a folder, not a result file: give the .json file", file=p)
    if not stat.S_ISREG(info.st_mode):
        raise ResultFileError("is not a regular file (a pipe, device or socket): give the "
                              ".json result file", file=p)
    if info.st_size > MAX_RESULT_BYTES:
        raise ResultFileError(f"is {info.st_size / 1e9:.1f} GB, larger than a result can be "
                              f"({MAX_RESULT_BYTES / 1e9:.0f} GB): name the right file", file=p)
    try:
        with open(p, "rb") as fh:
            return fh.read()
    except OSError as exc:
        raise ResultFileError(f"cannot read the file ({exc.strerror})", file=p) from None


MAX_RESULT_BYTES = 4_000_000_000  # a day-long sweep is a few hundred MB


def read_result(path, *, kinds=None) -> dict:
    """Read a result JSON and check its schema (and kind, if ``kinds`` is given) and the
    fields the commands use (:func:`check_result_fields`); errors name the file and field."""
    p = Path(path)
    raw = _read_regular(p)
    try:
        obj = json.loads(raw.decode("utf-8-sig"))
    except RecursionError:
        raise ResultFileError("the JSON is nested too deeply to be a result (damaged or not "
                              "a tdoa result)", file=p) from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ResultFileError(f"not a readable JSON result ({exc.__class__.__name__}: {exc})",
                              file=p) from None
    check_schema(obj, file=p, kinds=kinds)
    check_result_fields(obj, p)
    return obj


def check_schema(obj, *, file=None, kinds=None, reader="this command"):
    """The one check that ``obj`` is a ``tdoa-result/1`` document of one of ``kinds``.

    Returns ``obj``; raises :class:`ResultFileError` naming ``file`` and the field otherwise.
    """
    if not isinstance(obj, dict) or obj.get("schema") != SCHEMA:
        got = obj.get("schema") if isinstance(obj, dict) else type(obj).__name__
        raise ResultFileError(f"schema is {got!r}, expected {SCHEMA!r}: pass a result written "
                              "by tdoa fix, track or level", file=file, field="schema")
    if kinds is not None and obj.get("kind") not in kinds:
        raise ResultFileError(f"kind is {obj.get('kind')!r}; {reader} reads "
                              + " or ".join(repr(k) for k in kinds), file=file, field="kind")
    return obj


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _finite(v, where, p, *, optional=False):
    if v is None and optional:
        return
    if not _is_number(v) or not math.isfinite(v):
        raise ResultFileError(f"must be a finite number, got {_shown(v)}: the file was edited "
                              "or damaged; make it again with tdoa", file=p, field=where)


MAX_POSITION_M = 1e8  # farther than this from the site's origin is no position on Earth


def _vector(v, where, p, *, optional=False):
    if v is None and optional:
        return
    if not isinstance(v, list) or len(v) not in (2, 3):
        raise ResultFileError(f"must be a list [x, y, z] of numbers, got {_shown(v)}", file=p,
                              field=where)
    for k, c in enumerate(v):
        _finite(c, f"{where}[{k}]", p)
        if abs(c) > MAX_POSITION_M:
            raise ResultFileError(f"{c:g} m is no position on Earth (more than "
                                  f"{MAX_POSITION_M:g} m from the site's origin): the file was "
                                  "edited or damaged", file=p, field=f"{where}[{k}]")


def _shown(v) -> str:
    text = json.dumps(v, allow_nan=True)[:40] if not isinstance(v, float) else repr(v)
    return text


def _list_of(v, kind, where, p, *, optional=True):
    if v is None and optional:
        return []
    if not isinstance(v, list) or not all(isinstance(x, kind) for x in v):
        name = {dict: "objects", str: "texts"}.get(kind, kind.__name__)
        raise ResultFileError(f"must be a list of {name}, got {_shown(v)}", file=p, field=where)
    return v


def _numbers_or_none(v, where, p):
    """A number, None (written for infinity), or nested lists of those (a matrix)."""
    if v is None or _is_number(v):
        return
    if isinstance(v, list):
        for k, x in enumerate(v):
            _numbers_or_none(x, f"{where}[{k}]", p)
        return
    raise ResultFileError(f"must be a number (or null), got {_shown(v)}", file=p, field=where)


def _check_entry(f, where, p, time_key):
    if not isinstance(f, dict):
        raise ResultFileError(f"must be an object, got {_shown(f)}", file=p, field=where)
    _vector(f.get("position_m"), f"{where}.position_m", p)
    if time_key in f or time_key == "t_s":
        _finite(f.get(time_key), f"{where}.{time_key}", p, optional=time_key != "t_s")
    for key in ("t_heard_s", "residual_rms_s", "duration_s"):
        if key in f:
            _finite(f.get(key), f"{where}.{key}", p, optional=True)
    for key in ("mirror_position_m", "position_now_m"):
        _vector(f.get(key), f"{where}.{key}", p, optional=True)
    for key in ("covariance_m2", "span_s"):
        _numbers_or_none(f.get(key), f"{where}.{key}", p)
    for key in ("ellipse95", "ellipse50"):
        e = f.get(key)
        if e is not None and not isinstance(e, dict):
            raise ResultFileError(f"must be an object, got {_shown(e)}", file=p,
                                  field=f"{where}.{key}")
        for k2, v in (e or {}).items():
            _numbers_or_none(v, f"{where}.{key}.{k2}", p)
    for key in ("rejected_mics", "dead_mics", "used_mics", "warnings"):
        _list_of(f.get(key), str, f"{where}.{key}", p)
    _list_of(f.get("delays"), dict, f"{where}.delays", p)


def check_result_fields(obj: dict, path) -> None:
    """Check the fields of a result that the commands read: positions and times are finite
    numbers, lists are lists; the error names the file and the field (``fixes[2].t_s``)."""
    p = path
    for k, f in enumerate(_list_of(obj.get("fixes"), object, "fixes", p)):
        _check_entry(f, f"fixes[{k}]", p, "t_s")
    for k, m in enumerate(_list_of(obj.get("mics"), dict, "mics", p)):
        if not isinstance(m.get("name"), str):
            raise ResultFileError(f"must be a text, got {_shown(m.get('name'))}", file=p,
                                  field=f"mics[{k}].name")
        _vector(m.get("position_m"), f"mics[{k}].position_m", p,
                optional="position_m" not in m)
    _finite(obj.get("sound_speed_mps"), "sound_speed_mps", p, optional=True)
    _list_of(obj.get("warnings"), str, "warnings", p)
    _list_of(obj.get("levels"), dict, "levels", p)
    track = obj.get("track")
    if obj.get("kind") == "track" or track is not None:
        if not isinstance(track, dict):
            raise ResultFileError(f"must be an object, got {_shown(track)}", file=p,
                                  field="track")
        for k, pt in enumerate(_list_of(track.get("points"), object, "track.points", p)):
            _check_entry(pt, f"track.points[{k}]", p, "t_emit_s")
        for key in ("heading_deg", "speed_mps"):
            if key in track:
                _finite(track.get(key), f"track.{key}", p, optional=True)


@contextlib.contextmanager
def reading_result(path):
    """Around the use of a result read back: an error about it names the file, and a field
    of the wrong shape that the checks let through is one line naming the file."""
    try:
        yield
    except ResultFileError as exc:
        if exc.file is None:
            exc.file = str(path)
        raise
    except TdoaError:
        raise
    except (KeyError, TypeError, IndexError, AttributeError, ValueError) as exc:
        raise ResultFileError(f"a field is missing or malformed ({type(exc).__name__}: "
                              f"{str(exc)[:80]}): make the result again with tdoa (or run with "
                              "--debug if the file is untouched)", file=path) from None


OTHER_SITE_FRACTION = 0.1  # a mic this far (fraction of the array's extent, and > 1 m) off
OTHER_SITE_MIN_M = 1.0  # its site-file position: the result belongs to another layout


def mic_moves_m(site, result):
    """How far each mic of ``result`` (``mics[].position_m``) lies from the site's, (N,) m.

    None when the result does not give positions for exactly the site's mics.
    """
    mics = result.get("mics")
    try:
        pos = np.array([m["position_m"] for m in mics], dtype=float)
        return np.linalg.norm(pos - site.positions_m, axis=1)
    except (KeyError, TypeError, ValueError, IndexError):
        return None


def check_mic_positions(site, result, label):
    """Refuse a result whose mics (same names) stand elsewhere: another site's layout.

    A re-survey moves mics by centimetres; a mic more than ``OTHER_SITE_FRACTION`` of the
    array's extent and more than ``OTHER_SITE_MIN_M`` from its site-file position means the
    result was made for another site that happens to use the same mic names.
    """
    moved = mic_moves_m(site, result)
    if moved is None or not np.all(np.isfinite(moved)):
        return
    pos = site.positions_m
    extent = float(np.max(np.linalg.norm(pos[:, None, :] - pos[None, :, :], axis=-1)))
    limit = max(OTHER_SITE_FRACTION * extent, OTHER_SITE_MIN_M)
    k = int(np.argmax(moved))
    if moved[k] > limit:
        raise ResultFileError(
            f"its mic {site.mic_names[k]} stands {moved[k]:.1f} m from where the site file "
            f"{Path(site.path).name} puts it (mics with the same names, elsewhere): was it "
            "made from another site?", file=label, field="mics")


def fix_to_dict(fix, delays, mic_names, *, t_s, span_s=None, extra=None) -> dict:
    """One entry of ``"fixes"`` in the result JSON."""
    cov = np.asarray(fix.covariance_m2, dtype=float)
    entry = {
        "t_s": float(t_s),
        "position_m": [round(float(v), 6) for v in fix.position_m],
        "covariance_m2": cov.tolist(),
        "ellipse95": _rounded(ellipse(cov, 0.95)),
        "ellipse50": _rounded(ellipse(cov, 0.50)),
        "rejected_mics": list(fix.rejected_mics),
        "dead_mics": list(fix.dead_mics),
        "used_mics": [n for n, u in zip(mic_names, fix.used) if u],
        "residual_rms_s": float(fix.residual_rms_s),
        "chi2": float(fix.chi2),
        "dof": int(fix.dof),
        "p_value": float(fix.p_value),
        "mirror_position_m": None if fix.mirror_position_m is None
        else [round(float(v), 3) for v in fix.mirror_position_m],
        "dims": int(fix.dims),
        "band_hz": [float(delays.band_hz[0]), float(delays.band_hz[1])],
        "delays": delays.to_dicts(mic_names),
        "warnings": list(fix.warnings),
    }
    dropped = {tuple(p) for p in fix.dropped_pairs}
    used = set(entry["used_mics"])
    for d in entry["delays"]:
        a, b = d["mics"]
        d["used"] = a in used and b in used and (a, b) not in dropped
    if span_s is not None:
        entry["span_s"] = [float(span_s[0]), float(span_s[1])]
    if delays.curves is not None:
        for d, curve in zip(entry["delays"], delays.curves):
            d["curve"] = curve
    if extra:
        entry.update(extra)
    return entry


def _rounded(e):
    return {k: (round(v, 4) if math.isfinite(v) else v) for k, v in e.items()}


FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
"""A text cell starting with one of these is read as a formula by spreadsheet programs."""


def text_cell(value) -> str:
    """A CSV cell for text (a mic name, a warning): one that a spreadsheet would run as a
    formula gets a leading single quote (OWASP "CSV Injection" guidance).  Numbers written
    by :func:`fixes_csv` are not passed through here and stay numbers (``-3.000``)."""
    text = str(value)
    text = "'" + text if text.startswith(FORMULA_STARTS) else text
    return text.replace("\r", " ").replace("\n", " ")  # one line per row (a bare CR would
    # end the row for a reader: the csv module quotes only the line terminator "\n")


def fixes_csv(result: dict) -> str:
    """CSV text with one row per fix of a result dict (text cells neutralised:
    :func:`text_cell`).

    The last column, ``t_utc``, is the clock time (ISO 8601, UTC) where the recordings carry
    one, else empty (a column added after the first release: readers by name are unaffected).
    """
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["t_s", "x_m", "y_m", "z_m", "semi_major95_m", "semi_minor95_m",
                "azimuth95_deg", "rejected_mics", "residual_rms_s", "p_value", "warnings",
                "t_utc"])
    for f in result.get("fixes", []):
        e = f["ellipse95"]
        x, y, z = f["position_m"]
        w.writerow([f"{f['t_s']:.4f}", f"{x:.3f}", f"{y:.3f}", f"{z:.3f}",
                    _fmt(e["semi_major_m"]), _fmt(e["semi_minor_m"]), _fmt(e["azimuth_deg"]),
                    text_cell(" ".join(f["rejected_mics"])), f"{f['residual_rms_s']:.3e}",
                    f"{f['p_value']:.3g}", text_cell(" | ".join(f["warnings"])),
                    f.get("t_utc") or ""])
    return buf.getvalue()


def _fmt(v):
    return "" if v is None or not math.isfinite(v) else f"{v:.3f}"


SAME_PLACE_M = 0.01  # a mic moved by more than this since the result: say so


def check_same_site(site, result, label):
    """Refuse a result made from another site file (its mic names differ from the site's).

    Returns
    -------
    list of str
        Notes for the report when the names agree but mics moved (re-surveyed since).

    Raises
    ------
    locate.errors.ResultFileError
        Naming the result file and the field ``mics``.
    """
    mics = result.get("mics")
    if not isinstance(mics, list) or not mics:
        return [f"{label} does not list its mics: it could not be checked against the site "
                "file"]
    names = [str(m.get("name")) if isinstance(m, dict) else str(m) for m in mics]
    if names != site.mic_names:
        missing = [n for n in site.mic_names if n not in names]
        extra = [n for n in names if n not in site.mic_names]
        if not extra and not missing:
            detail = "; the same names in another order"
        elif len(extra) < len(names):
            detail = "; " + "; ".join(p for p in (
                f"not in the site: {', '.join(extra)}" if extra else "",
                f"not in the result: {', '.join(missing)}" if missing else "") if p)
        else:
            detail = ""
        raise ResultFileError(f"its mics ({', '.join(names)}) are not those of the site file "
                              f"{site.path.name} ({', '.join(site.mic_names)}{detail}): was "
                              "it made from another site?", file=label, field="mics")
    notes = []
    check_mic_positions(site, result, label)
    moved = mic_moves_m(site, result)
    if moved is None:
        return notes
    if np.nanmax(moved) > SAME_PLACE_M:
        k = int(np.nanargmax(moved))
        notes.append(f"{label} was computed with mic positions that differ from the site file "
                     f"by up to {format_length(moved[k])} (mic {names[k]}): the site file was "
                     "edited after the result was made")
    return notes


def fix_label(entry, k: int) -> str:
    """How a fix is numbered for people: the event's own number (as ``tdoa events`` lists
    it) when the fix is of a detected event, else its place ``k`` (1-based) in the result."""
    no = entry.get("event") if isinstance(entry, dict) else None
    return str(no) if isinstance(no, int) and not isinstance(no, bool) and no > 0 else str(k)
