"""Result files: schema ``tdoa-result/1`` (JSON), CSV and GeoJSON, written atomically.

The JSON schema is stable (other tools read it); extra keys are allowed.  Every write goes to
a temporary file in the target folder and is renamed over the target in one step, so a crash
or Ctrl-C never leaves a half-written result, and an input file is never overwritten.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np

from locate.common import format_length, write_atomic
from locate.errors import OptionError, ResultFileError
from locate.geometry.ellipses import ellipse

__all__ = [
    "SCHEMA",
    "CAUTIONS",
    "write_atomic",
    "write_json",
    "read_result",
    "fix_to_dict",
    "fixes_csv",
    "check_output_path",
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


def check_output_path(path, inputs=(), *, option="--json"):
    """Refuse an output path whose folder is missing or that would overwrite an input."""
    if path is None:
        return None
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise OptionError(f"the folder {str(parent)!r} does not exist: create it first",
                          file=str(p), field=option)
    for inp in inputs:
        if inp is None:
            continue
        try:
            if p.exists() and Path(inp).exists() and p.resolve() == Path(inp).resolve():
                raise OptionError("this is one of the input files: choose another output path",
                                  file=str(p), field=option)
        except OSError:
            continue
    return p


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


def write_json(path, obj, *, indent=1) -> Path:
    """Write ``obj`` as JSON (indented; ``indent=None``: compact and much faster), atomically."""
    text = json.dumps(jsonable(obj), indent=indent, allow_nan=False)
    return write_atomic(path, text + "\n")


def read_result(path, *, kinds=None) -> dict:
    """Read a result JSON and check its schema (and kind, if ``kinds`` is given)."""
    p = Path(path)
    try:
        obj = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ResultFileError("file not found", file=p) from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ResultFileError(f"not a readable JSON result ({exc.__class__.__name__}: {exc})",
                              file=p) from None
    return check_schema(obj, file=p, kinds=kinds)


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


def fixes_csv(result: dict) -> str:
    """CSV text with one row per fix of a result dict.

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
                    " ".join(f["rejected_mics"]), f"{f['residual_rms_s']:.3e}",
                    f"{f['p_value']:.3g}", " | ".join(f["warnings"]), f.get("t_utc") or ""])
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
