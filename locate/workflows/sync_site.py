"""Clock calibration around the site file: reference points in the site's frame, the run over
the recordings, and the new site file (the estimation itself is in :mod:`locate.sync.clocks`).

* :func:`parse_point` reads ``--at`` in the site's own frame (x,y[,z] metres for a local site,
  lat,lon[,alt] for a WGS84 site) and refuses values that belong to the other frame;
* :func:`calibrate` reads each reference span, measures its delays, turns them into clock
  corrections and fits offsets (and, with two events, drifts);
* :func:`synced_site_raw` returns the site's raw dict with ``offset_s``, ``drift_ppm`` and
  ``clock_sd_s`` filled in, paths rebased for the new file's folder;
  :func:`synced_site_text` writes those into the input file's text in place (tomlkit), keeping
  the user's comments, order and formatting.
"""

from __future__ import annotations

import copy
import os
import re
from pathlib import Path, PurePath

import numpy as np

from locate.errors import OptionError
from locate.fix import air_solve as _airfit
from locate.signal.delays import all_pairs
from locate.sync.clocks import ClockFit, clock_corrections, fit_clocks, reference_delays

__all__ = ["parse_point", "calibrate", "synced_site_raw", "synced_site_text",
           "sound_speed_sd_mps", "summary_lines",
           "sync_report", "MAX_REFERENCE_DISTANCE_M"]

MAX_REFERENCE_DISTANCE_M = 2000.0
"""A reference point farther than this (and than 10 array apertures) from the array centre is
refused: every mic must hear the reference sound, so it is made near the array."""

_DECIMALS_DEGREES = 5  # a local coordinate written with this many decimals looks like degrees

# ------------------------------------------------------------------------- reference point

def _decimals(text: str) -> int:
    m = re.fullmatch(r"[+-]?\d*\.(\d+)(?:[eE][+-]?\d+)?", text.strip())
    return len(m.group(1)) if m and "e" not in text.lower() else 0


def parse_point(text, site, *, option="--at") -> np.ndarray:
    """A reference point given on the command line, in the site's frame -> local metres (3,).

    Parameters
    ----------
    text : str
        ``"x,y[,z]"`` in metres for a site with ``coordinates = "local"``; ``"lat,lon[,alt]"``
        (degrees, ellipsoidal height in metres) for a ``"wgs84"`` site.  A missing height is
        the mean height of the mics.
    site : locate.io.site.Site

    Returns
    -------
    ndarray, shape (3,)
        Local metres (x east, y north, z up).

    Raises
    ------
    OptionError
        Not 2 or 3 numbers; values in the wrong frame (degrees for a local site, metres or
        lon/lat swapped for a WGS84 site); a point too far from the array to be a reference.
    """
    parts = [p for p in str(text).replace(";", ",").split(",")]
    frame = "lat,lon[,alt]" if site.coordinates == "wgs84" else "x,y[,z]"
    try:
        vals = [float(p) for p in parts]
    except ValueError:
        raise OptionError(f"{text!r} is not {frame} (numbers separated by commas)",
                          field=option) from None
    if len(vals) not in (2, 3) or not all(np.isfinite(vals)):
        raise OptionError(f"{text!r}: give 2 or 3 numbers, {frame}", field=option)
    pos = site.positions_m
    centre = pos.mean(axis=0)
    aperture = float(np.max(np.linalg.norm(pos[:, None, :2] - pos[None, :, :2], axis=-1)))
    limit = max(MAX_REFERENCE_DISTANCE_M, 10.0 * aperture)
    if site.coordinates == "wgs84":
        lat, lon = vals[0], vals[1]
        if not (-90.0 <= lat <= 90.0 and -180.0 <= lon <= 180.0):
            raise OptionError(f"{text!r} is not a latitude,longitude in degrees: this site has "
                              'coordinates = "wgs84", give lat,lon[,alt] (not metres)',
                              field=option)
        from locate.geometry.frames import enu_from_wgs84
        origin = site.origin_wgs84
        alt = vals[2] if len(vals) == 3 else float(np.mean([m.geodetic[2] for m in site.mics]))
        p = np.asarray(enu_from_wgs84(lat, lon, alt, origin), dtype=float).reshape(3)
        dist = float(np.linalg.norm(p[:2] - centre[:2]))
        if dist > limit:
            swapped = np.asarray(enu_from_wgs84(lon, lat, alt, origin), float).reshape(3) \
                if abs(lon) <= 90.0 else None
            hint = ("the values look swapped: give latitude first, then longitude"
                    if swapped is not None and np.linalg.norm(swapped[:2] - centre[:2]) <= limit
                    else "this site has coordinates = \"wgs84\": give the latitude and longitude"
                    " in degrees of a point near the mics (not metres)")
            raise OptionError(f"{text!r} is {dist / 1000:.0f} km from the array centre: {hint}",
                              field=option)
        return p
    x, y = vals[0], vals[1]
    if (abs(x) <= 90.0 and abs(y) <= 180.0 and min(_decimals(parts[0]), _decimals(parts[1]))
            >= _DECIMALS_DEGREES):
        raise OptionError(f"{text!r} looks like latitude,longitude in degrees, but this site "
                          'has coordinates = "local": give x,y[,z] in metres in the site\'s frame',
                          field=option)
    z = vals[2] if len(vals) == 3 else float(centre[2])
    p = np.array([x, y, z])
    dist = float(np.linalg.norm(p[:2] - centre[:2]))
    if dist > limit:
        raise OptionError(f"{text!r} is {dist / 1000:.1f} km from the array centre: give x,y[,z] "
                          "in metres in the site's local frame (a reference sound must be heard "
                          "by every mic)", field=option)
    return p



# ------------------------------------------------------------------------- the run

def sound_speed_sd_mps(site) -> float:
    """Sound-speed uncertainty from the site's ``air.temperature_sd_c`` (0 with an override)."""
    return _airfit.sound_speed_sd_mps(site.air)


def calibrate(site, recordings, cond, spans, points_m, *, band_hz=None, point_sd_m=0.0,
              passes=2, progress=None):
    """Clock fit from one or two reference sounds.

    Parameters
    ----------
    site : locate.io.site.Site
    recordings : locate.io.audio.Recordings
    cond : locate.workflows.fixing.Conditions
        Sound speed and wind.
    spans : sequence of (float, float)
        One or two common-time spans, each holding one reference sound at every mic.
    points_m : sequence of ndarray (3,)
        Where each reference sound was made (local metres).
    band_hz : (float, float), optional
    point_sd_m : float
        Uncertainty of the reference points, metres per axis.
    passes : int
        The delays are measured again with the previous pass's clocks applied (a drifting
        clock stretches a long reference sound; the second pass removes that), default 2.
    progress : callable, optional
        Called with 1 after each reference sound of each pass (``passes * len(spans)``
        calls), e.g. a progress bar's ``update``.

    Returns
    -------
    fit : locate.sync.clocks.ClockFit
    events : list of dict
        Per reference event (last pass): span, analysed window, corrections, warnings.
    """
    site_offset = np.array([m.offset_s for m in site.mics], dtype=float)
    rec = recordings
    for k in range(max(int(passes), 1)):
        fit, reports = _one_pass(site, rec, cond, spans, points_m, site_offset, band_hz,
                                 point_sd_m, progress)
        if k == passes - 1:
            break
        offsets = rec.offsets_s + (fit.offset_s - site_offset)
        drift = rec.drift_ppm if fit.drift_ppm is None else fit.drift_ppm
        rec = rec.with_clocks(offsets, drift)
        site_offset = fit.offset_s
    return fit, reports


def _regrade_ground_echoes(ev, point, pos, cond, names):
    """As ``fix``: a pair whose next peak is the ground reflection's is not ambiguous."""
    from dataclasses import replace

    from locate.accuracy.reflections import ground_echo_pairs

    echo = ground_echo_pairs(ev.delays, point, pos, cond.sound_speed_mps, cond.wind_mps)
    amb = np.array([q == "ambiguous" for q in ev.delays.quality])
    if not (amb & echo).any():
        return
    ev.delays = replace(ev.delays, quality=tuple(
        "good" if a else q for q, a in zip(ev.delays.quality, amb & echo, strict=True)))
    head = "ambiguous correlation of the reference sound"
    left = [f"{names[i]}-{names[j]}" for (i, j), a in zip(ev.delays.pairs, amb & ~echo,
                                                          strict=True) if a]
    ev.warnings = [w for w in ev.warnings if not w.startswith(head)]
    if left:
        ev.warnings.append(head + " (several near-equal peaks: an echo?) for pair(s) "
                           + ", ".join(left))


def _one_pass(site, rec, cond, spans, points_m, site_offset, band_hz, point_sd_m,
              progress=None):
    names = site.mic_names
    pos = site.positions_m
    sd_c = sound_speed_sd_mps(site)
    pos_sd = np.array([m.position_sd_m or 0.0 for m in site.mics])
    measured, reports, ref = [], [], None
    from locate.accuracy.reflections import with_ground_reflection
    from locate.workflows.fixing import ground_datum_m, search_lags_s

    for (a, b), point in zip(spans, points_m, strict=True):
        signals, residual = rec.read(a, b)
        ev = reference_delays(signals, rec.sample_rate_hz, residual, t0_s=a,
                              band_hz=band_hz, mic_names=names,
                              max_lag_s=search_lags_s(site, cond, all_pairs(len(names))))
        # the same delay model as fix: the ground reflection's bias (the point is known)
        if ground_datum_m(site) is not None:
            ev.delays = with_ground_reflection(ev.delays, point, pos, cond.sound_speed_mps,
                                               cond.wind_mps)
            _regrade_ground_echoes(ev, point, pos, cond, names)
        delta, cov, r, dropped = clock_corrections(
            ev.delays, point, pos, cond.sound_speed_mps, wind_mps=cond.wind_mps,
            sound_speed_sd_mps=sd_c, position_sd_m=pos_sd, point_sd_m=point_sd_m)
        if ref is None:
            ref = r
        elif r != ref:
            raise OptionError(f'mic "{names[ref]}" did not hear the reference sound in '
                              f"{a:g}..{b:g} s: the reference mic must hear both",
                              field="start2_s")
        warnings = list(ev.warnings)
        if dropped:
            warnings.append("pair delays that do not agree with the others were dropped: "
                            + ", ".join(f"{names[i]}-{names[j]}"
                                        for i, j in ev.delays.pairs[dropped]))
        measured.append((delta, cov, ev.t_seen_s))
        reports.append({"span_s": [float(a), float(b)], "at_m": [float(v) for v in point],
                        "window_s": [float(ev.window_s[0]), float(ev.window_s[1])],
                        "band_hz": [float(v) for v in ev.delays.band_hz],
                        "correction_s": delta, "correction_sd_s":
                        np.sqrt(np.clip(np.diag(np.nan_to_num(cov, nan=np.inf)), 0, None)),
                        "warnings": warnings})
        if progress is not None:
            progress(1)
    scale = 1.0 + rec.drift_ppm * 1e-6
    cover = np.stack([(rec.start_s - rec.offsets_s) * scale,
                      (rec.stop_s - rec.offsets_s) * scale], axis=1)
    fit = fit_clocks(measured, rec.offsets_s, rec.drift_ppm, site_offset, cover, reference=ref)
    if sd_c <= 0 and not np.any(pos_sd > 0) and not point_sd_m:
        fit.warnings.append("timing-only uncertainty: nothing was declared about the mic "
                            "survey, the air or the reference point, so the offsets' "
                            "uncertainties cover the correlation timing alone")
    deaf = [names[k] for k in range(len(names)) if not np.all(np.isfinite(fit.correction_s[:, k]))]
    if deaf:
        fit.warnings.append("no clock correction for mic(s) " + ", ".join(deaf)
                            + ": they keep their offset_s")
    return fit, reports


# ------------------------------------------------------------------------- new site file

_PATH_KEYS = (("recording", "file"), ("sketch", "image"), ("sketch", "geojson"))


def _rebase(text, old_folder: Path, new_folder: Path) -> str:
    p = Path(str(text)).expanduser()
    target = (old_folder / p).resolve()
    try:
        rel = os.path.relpath(target, new_folder)
    except ValueError:  # another drive (Windows): keep it absolute
        return target.as_posix()
    return PurePath(rel).as_posix()


def synced_site_raw(site, fit: ClockFit, out_path) -> dict:
    """The site's raw dict with ``offset_s`` (and ``drift_ppm``, ``clock_sd_s``) filled in.

    Relative paths (recordings, sketch) are rewritten for the folder of ``out_path`` so the
    new site file finds the same files.  The input dict is not changed.
    """
    raw = copy.deepcopy(site.raw)
    old_folder = Path(site.path).resolve().parent
    new_folder = Path(out_path).resolve().parent
    if old_folder != new_folder:
        for table, key in _PATH_KEYS:
            if isinstance(raw.get(table), dict) and isinstance(raw[table].get(key), str):
                raw[table][key] = _rebase(raw[table][key], old_folder, new_folder)
        for m in raw.get("mics", []):
            if isinstance(m.get("file"), str):
                m["file"] = _rebase(m["file"], old_folder, new_folder)
    for k, m in enumerate(raw["mics"]):
        m["offset_s"] = round(float(fit.offset_s[k]), 9)
        if fit.drift_ppm is not None and np.isfinite(fit.drift_ppm[k]):
            m["drift_ppm"] = round(float(fit.drift_ppm[k]), 5)
        sd = float(fit.clock_sd_s[k]) if k != fit.reference else 0.0
        if np.isfinite(sd):
            m["clock_sd_s"] = float(f"{sd:.3g}")
    return raw


def _update_in_place(node, new):
    """Set in the tomlkit container ``node`` every value of the plain ``new`` that differs,
    recursing into tables and arrays of tables; untouched keys keep their comments, order and
    formatting.  False when the structures do not match (the caller then writes afresh)."""
    if isinstance(new, dict):
        if not hasattr(node, "keys"):
            return False
        for key, value in new.items():
            if key in node and isinstance(value, dict | list) and not _scalar_list(value):
                if not _update_in_place(node[key], value):
                    return False
            elif key not in node or _plain(node[key]) != value:
                node[key] = value
        return True
    if isinstance(new, list):
        if not isinstance(node, list) or len(node) != len(new):
            return False
        return all(_update_in_place(a, b) for a, b in zip(node, new, strict=True))
    return False


def _scalar_list(value):
    return isinstance(value, list) and not any(isinstance(v, dict) for v in value)


def _plain(item):
    unwrap = getattr(item, "unwrap", None)
    return unwrap() if callable(unwrap) else item


def synced_site_text(site, fit: ClockFit, out_path) -> str:
    """The new site file's text: the input file with ``offset_s``, ``drift_ppm`` and
    ``clock_sd_s`` (and rebased paths) edited in place by the round-trip TOML library
    ``tomlkit``, so the user's comments, order and formatting survive.  Falls back to a fresh
    dump (:func:`locate.io.site.dump_site_toml`) when the file cannot be edited so."""
    from locate.io.site import dump_site_toml

    raw = synced_site_raw(site, fit, out_path)
    try:
        import tomlkit

        doc = tomlkit.parse(Path(site.path).read_text(encoding="utf-8"))
        if _update_in_place(doc, raw):
            return tomlkit.dumps(doc)
    except Exception:  # noqa: BLE001 - any trouble with the round trip: write afresh
        pass
    return dump_site_toml(raw)


# ------------------------------------------------------------------------- reporting

def summary_lines(site, fit: ClockFit) -> list[str]:
    """Human-readable table of the clock fit, one line per mic."""
    names = site.mic_names
    two = fit.drift_ppm is not None
    lines = [f"Clock corrections relative to mic \"{names[fit.reference]}\" "
             f"({'offset and drift from two' if two else 'offset from one'} reference sound"
             f"{'s' if two else ''}):"]
    for k, name in enumerate(names):
        sd = fit.offset_sd_s[k]
        text = (f"  {name:<10} offset_s {fit.offset_s[k]:+.7f} s "
                f"(± {_us(sd)})")
        if two:
            text += f"   drift_ppm {fit.drift_ppm[k]:+.3f} (± {fit.drift_sd_ppm[k]:.3f})"
        if k == fit.reference:
            text += "   reference"
        lines.append(text)
    return lines


def _us(v) -> str:
    if not np.isfinite(v):
        return "unknown"
    return f"{v * 1e6:.2f} µs" if v < 1e-3 else f"{v * 1e3:.2f} ms"


def sync_report(site, cond, fit: ClockFit, events) -> dict:
    """Result dictionary (``tdoa-result/1``, ``kind = "sync"``) of a clock calibration."""
    from locate import __version__
    from locate.results.documents import SCHEMA

    names = site.mic_names
    mics = []
    for k, name in enumerate(names):
        m = {"name": name, "offset_s": float(fit.offset_s[k]),
             "offset_sd_s": float(fit.offset_sd_s[k]), "clock_sd_s": float(fit.clock_sd_s[k])}
        if fit.drift_ppm is not None:
            m.update(drift_ppm=float(fit.drift_ppm[k]), drift_sd_ppm=float(fit.drift_sd_ppm[k]))
        mics.append(m)
    evs = []
    for e in events:
        e = dict(e)
        e["correction_s"] = [float(v) for v in e["correction_s"]]
        e["correction_sd_s"] = [float(v) for v in e["correction_sd_s"]]
        evs.append(e)
    return {"schema": SCHEMA, "kind": "sync", "site": str(site.path), "title": site.title,
            "tool": {"name": "tdoa", "version": __version__},
            "sound_speed_mps": round(cond.sound_speed_mps, 3),
            "reference_mic": names[fit.reference], "mics": mics, "events": evs,
            "warnings": list(fit.warnings) + [w for e in events for w in e["warnings"]]}
