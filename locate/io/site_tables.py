"""Site-file tables ([air], [survey], [recording], [[mics]], [[receivers]], [[barriers]],
[sketch]) parsed into plain dicts of checked values (used by :mod:`locate.io.site`).

Plausibility limits are common practice for outdoor acoustic surveys.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from locate.io.site_fields import (
    check_keys,
    get_int,
    get_nonneg,
    get_number,
    get_str,
    get_table,
    points,
    position,
    start_time_field,
    table_array,
)

TOP_KEYS = ("title", "coordinates", "air", "recording", "mics", "receivers", "barriers",
            "sketch", "survey", "candidates", "region", "report")
REPORT_KEYS = ("client", "site_address", "job_reference", "author", "checked_by",
               "survey_dates", "revision")
"""The ``[report]`` table: what a consultant's report carries on its title block."""
AIR_KEYS = ("temperature_c", "relative_humidity", "pressure_kpa", "wind_speed_mps",
            "wind_from_deg", "temperature_sd_c", "wind_sd_mps", "sound_speed_mps")
SURVEY_KEYS = ("position_sd_m", "height_sd_m", "clock_sd_s")
MIC_KEYS = ("name", "x", "y", "z", "lat", "lon", "alt", "channel", "file", "offset_s",
            "drift_ppm", "start_time", "time_zone", "full_scale_db_spl", *SURVEY_KEYS)
RECEIVER_KEYS = ("name", "x", "y", "z", "lat", "lon", "alt")
BARRIER_KEYS = ("label", "line", "height_m")
SKETCH_KEYS = ("image", "refs", "shapes", "geojson")

TEMPERATURE_RANGE_C = (-50.0, 60.0)
PRESSURE_RANGE_KPA = (50.0, 110.0)
MAX_WIND_MPS = 40.0
MAX_DRIFT_PPM = 1000.0
SOUND_SPEED_RANGE_MPS = (250.0, 450.0)
FULL_SCALE_RANGE_DB = (60.0, 200.0)
RECEIVER_HEIGHT_M = 1.5  # default receiver height above the local z = 0 (common practice)


# ---------------------------------------------------------------------------------- air

def parse_air(ctx, raw, warnings) -> dict:
    air = get_table(ctx, raw, "air", required=True)
    check_keys(ctx, air, AIR_KEYS, "air")
    t = get_number(ctx, air, "temperature_c", "air.temperature_c", required=True,
                   hint="give the air temperature in degrees Celsius")
    lo, hi = TEMPERATURE_RANGE_C
    if not lo <= t <= hi:
        if 200.0 <= t <= 340.0:
            hint = f"it looks like kelvin: give degrees Celsius ({t - 273.15:.2f})"
        elif hi < t <= 140.0:
            hint = f"if it is degrees Fahrenheit, that is {(t - 32) / 1.8:.1f} degC"
        else:
            hint = "give degrees Celsius"
        raise ctx.error("air.temperature_c", f"{t:g} degC is outside {lo:g}..{hi:g} degC: {hint}")
    rh = get_number(ctx, air, "relative_humidity", "air.relative_humidity", required=True,
                    hint="give the relative humidity in percent (0-100)")
    if not 0.0 <= rh <= 100.0:
        raise ctx.error("air.relative_humidity", f"{rh:g} is outside 0..100: give percent")
    if 0.0 < rh <= 1.0:
        warnings.append(f"air.relative_humidity = {rh:g} % is very dry: if you meant "
                        f"{100 * rh:g} %, write {100 * rh:g}")
    p = get_number(ctx, air, "pressure_kpa", "air.pressure_kpa", default=101.325)
    lo, hi = PRESSURE_RANGE_KPA
    if not lo <= p <= hi:
        if 50e3 <= p <= 110e3:
            hint = f"it looks like pascals: give kilopascals ({p / 1000:g})"
        elif 500.0 <= p <= 1100.0:
            hint = f"it looks like hPa (mbar): give kilopascals ({p / 10:g})"
        else:
            hint = "give kilopascals (sea level is 101.325)"
        raise ctx.error("air.pressure_kpa", f"{p:g} kPa is outside {lo:g}..{hi:g} kPa: {hint}")
    w = get_number(ctx, air, "wind_speed_mps", "air.wind_speed_mps", default=0.0)
    if w < 0:
        raise ctx.error("air.wind_speed_mps", f"must be zero or positive, got {w:g} "
                        "(give the direction in wind_from_deg)")
    if w >= MAX_WIND_MPS:
        raise ctx.error("air.wind_speed_mps", f"{w:g} m/s is a storm (limit {MAX_WIND_MPS:g}): "
                        f"give metres per second (km/h / 3.6 = {w / 3.6:.1f})")
    wd = get_number(ctx, air, "wind_from_deg", "air.wind_from_deg", default=0.0) % 360.0
    override = get_number(ctx, air, "sound_speed_mps", "air.sound_speed_mps")
    if override is not None:
        lo, hi = SOUND_SPEED_RANGE_MPS
        if not lo <= override <= hi:
            raise ctx.error("air.sound_speed_mps", f"{override:g} m/s is outside {lo:g}..{hi:g}"
                            " m/s: give the speed of sound in air in metres per second")
    return dict(temperature_c=t, relative_humidity=rh, pressure_kpa=p, wind_speed_mps=w,
                wind_from_deg=wd,
                temperature_sd_c=get_nonneg(ctx, air, "temperature_sd_c",
                                            "air.temperature_sd_c", 0.0),
                wind_sd_mps=get_nonneg(ctx, air, "wind_sd_mps", "air.wind_sd_mps", 0.0),
                sound_speed_override_mps=override)


def parse_survey(ctx, raw) -> dict:
    s = get_table(ctx, raw, "survey") or {}
    check_keys(ctx, s, SURVEY_KEYS, "survey")
    return {k: get_nonneg(ctx, s, k, f"survey.{k}") for k in SURVEY_KEYS}


def parse_report(ctx, raw) -> dict:
    """The ``[report]`` table: title-block fields, each a string (absent keys left out)."""
    r = get_table(ctx, raw, "report") or {}
    check_keys(ctx, r, REPORT_KEYS, "report")
    out = {}
    for k in REPORT_KEYS:
        v = get_str(ctx, r, k, f"report.{k}")
        if v is not None and v.strip():
            out[k] = " ".join(v.split())
    return out


def parse_recording(ctx, raw) -> Path | None:
    rec = get_table(ctx, raw, "recording")
    if rec is None:
        return None
    check_keys(ctx, rec, ("file",), "recording")
    f = get_str(ctx, rec, "file", "recording.file", required=True,
                hint="give the multichannel audio file, relative to the site file")
    return ctx.resolve(f)


def _audio_info(ctx, path, field, require_audio, warnings):
    """soundfile.info for a file (cached); None if missing and not required."""
    if path in ctx.audio_info:
        return ctx.audio_info[path]
    import soundfile

    info = None
    if not path.exists():
        msg = f"file not found: {path} (paths are relative to the site file's folder)"
        if path.is_symlink():
            msg = (f"{path} is a symbolic link that leads nowhere (a loop or a missing "
                   "target): fix the link or name the audio file")
        if require_audio:
            raise ctx.error(field, msg)
        warnings.append(f"{field}: {msg}")
    elif path.is_dir():
        raise ctx.error(field, f"{path} is a folder: give an audio file (WAV or FLAC)")
    elif not path.is_file():  # a FIFO would wait for a writer forever, a device never ends
        raise ctx.error(field, f"{path} is not a regular file (a pipe, device or socket): "
                        "copy the recording to a file and name that")
    else:
        try:
            info = soundfile.info(str(path))
        except (RuntimeError, soundfile.SoundFileError) as exc:
            raise ctx.error(field, f"cannot read {path.name} as audio "
                            f"({str(exc).splitlines()[-1].strip()}): give a WAV or FLAC "
                            "file") from None
    ctx.audio_info[path] = info
    return info


def parse_mics(ctx, raw, coords, survey, recording_file, warnings, *, dims, require_audio):
    """List of dicts (Mic fields, plus lat/lon/alt for WGS84) for every [[mics]] table."""
    mics = raw.get("mics")
    need = 3 if dims == 2 else 4
    if mics is None:
        raise ctx.error("mics", f"no [[mics]] tables: describe at least {need} microphones")
    if not isinstance(mics, list) or not all(isinstance(m, dict) for m in mics):
        raise ctx.error("mics", "must be [[mics]] tables, one per microphone")
    if len(mics) < need:
        raise ctx.error("mics", f"{len(mics)} mics given: a {dims}-D fix needs at least {need}")
    out, names, used, zoned = [], {}, {}, {}
    for i, m in enumerate(mics):
        where = f"mics[{i}]"
        check_keys(ctx, m, MIC_KEYS, where)
        name = get_str(ctx, m, "name", f"{where}.name", required=True,
                       hint="give each mic a name, e.g. name = \"M1\"").strip()
        if name in names:
            raise ctx.error(f"{where}.name", f'duplicate mic name "{name}" (also mics'
                            f"[{names[name]}]): give each mic its own name")
        names[name] = i
        pos = position(ctx, m, coords, where, who=f' of mic "{name}"')
        files, order = file_set(ctx, m, f"{where}.file", require_audio, warnings)
        if files is not None:
            own_path = files[0] if files else None
        else:
            own = get_str(ctx, m, "file", f"{where}.file")
            own_path = ctx.resolve(own) if own is not None else None
        channel = get_int(ctx, m, "channel", f"{where}.channel")
        if own_path is None and recording_file is None and require_audio:
            raise ctx.error(f"{where}.file", f'no recording for mic "{name}": give file = '
                            '"..." here or a [recording] file with a channel per mic')
        if own_path is None and recording_file is not None and channel is None:
            raise ctx.error(f"{where}.channel", f'missing for mic "{name}": give the 1-based '
                            "channel of the [recording] file")
        if channel is None and own_path is not None:
            channel = 1
        if channel is not None and channel < 1:
            raise ctx.error(f"{where}.channel", f"{channel} is not a channel: channels count "
                            "from 1")
        src = own_path if own_path is not None else recording_file
        src_field = f"{where}.file" if own_path is not None else "recording.file"
        if src is not None:
            info = _audio_info(ctx, src, src_field, require_audio, warnings)
            if info is not None and channel > info.channels:
                raise ctx.error(f"{where}.channel", f"channel {channel} of mic \"{name}\" does "
                                f"not exist: {src.name} has {info.channels} channel(s)")
            if (src, channel) in used:
                raise ctx.error(f"{where}.channel", f"channel {channel} of {src.name} is "
                                f'already used by mic "{used[(src, channel)]}"')
            used[(src, channel)] = name
        start, has_zone = start_time_field(ctx, m, f"{where}.start_time")
        zoned[i] = has_zone
        drift = get_number(ctx, m, "drift_ppm", f"{where}.drift_ppm", default=0.0)
        if abs(drift) > MAX_DRIFT_PPM:
            raise ctx.error(f"{where}.drift_ppm", f"{drift:g} ppm is beyond +/-{MAX_DRIFT_PPM:g}"
                            " ppm: give parts per million (1 ppm = 1 us per second)")
        fs_db = get_number(ctx, m, "full_scale_db_spl", f"{where}.full_scale_db_spl")
        if fs_db is not None and not FULL_SCALE_RANGE_DB[0] <= fs_db <= FULL_SCALE_RANGE_DB[1]:
            raise ctx.error(f"{where}.full_scale_db_spl", f"{fs_db:g} dB is outside "
                            "60..200 dB: give the SPL (dB re 20 uPa) of a 0 dBFS sine")
        zone = _time_zone(ctx, m, f"{where}.time_zone")
        d = dict(name=name, channel=channel, file=own_path, files=files, files_order=order,
                 time_zone=zone,
                 offset_s=get_number(ctx, m, "offset_s", f"{where}.offset_s", default=0.0),
                 drift_ppm=drift, start_time=start, full_scale_db_spl=fs_db)
        for k in SURVEY_KEYS:
            v = get_nonneg(ctx, m, k, f"{where}.{k}")
            d[k] = survey[k] if v is None else v
        if coords == "local":
            d["position_m"] = np.array(pos, dtype=float)
        else:
            d["lat"], d["lon"], d["alt"] = pos
        out.append(d)
    with_time = [i for i, z in zoned.items() if z is not None]
    # a recorder's file set may carry its own (bext) stamps: checked when the files are read
    if with_time and any(z is None and out[i]["files"] is None for i, z in zoned.items()):
        i = next(i for i, z in zoned.items() if z is None and out[i]["files"] is None)
        raise ctx.error(f"mics[{i}].start_time", "missing: give start_time for every mic or "
                        "for none")
    if with_time and len({zoned[i] for i in with_time}) > 1:
        i = next(i for i in with_time if not zoned[i])
        raise ctx.error(f"mics[{i}].start_time", "has no time zone while others do: add Z "
                        "(UTC) or +hh:mm to every start_time")
    return out


def file_set(ctx, m, field, require_audio, warnings):
    """``(files, order)`` when a mic's ``file`` is a glob or a list, else ``(None, None)``.

    ``files`` is a tuple of absolute paths (a glob's in natural name order, a list's as given);
    ``order`` is ``"name"`` or ``"list"``.  A glob that matches nothing is an error (a warning
    when audio is not required).
    """
    from locate.io.filesets import expand_pattern, is_pattern

    v = m.get("file")
    if isinstance(v, list):
        if not v:
            raise ctx.error(field, "is an empty list: name the recorder's files, or a pattern "
                            'such as "R1/*.wav"')
        out = []
        for k, item in enumerate(v):
            if not isinstance(item, str) or not item.strip():
                raise ctx.error(f"{field}[{k}]", "must be a file name (text)")
            if is_pattern(item):
                raise ctx.error(f"{field}[{k}]", f'"{item}" is a pattern inside a list: give '
                                "one pattern as the file, or a list of file names")
            out.append(ctx.resolve(item))
        if len(set(out)) != len(out):
            dup = next(p for p in out if out.count(p) > 1)
            raise ctx.error(field, f"names {dup.name} twice: give each file once")
        return tuple(out), "list"
    if isinstance(v, str) and is_pattern(v):
        hits = expand_pattern(ctx.path.parent, v)
        if not hits:
            msg = (f'"{v}" matches no file (patterns are relative to the site file\'s folder '
                   f"{ctx.path.parent.resolve()})")
            if require_audio:
                raise ctx.error(field, msg)
            warnings.append(f"{field}: {msg}")
            return (), "name"
        return tuple(p.resolve() for p in hits), "name"
    return None, None


_ZONE = re.compile(r"(?:Z|UTC|([+-])(\d{2}):?(\d{2}))", re.IGNORECASE)


def _time_zone(ctx, m, field):
    """A mic's ``time_zone`` (its recorder clock): ``"Z"``, ``"UTC"`` or ``"+hh:mm"``; or None."""
    v = m.get("time_zone")
    if v is None:
        return None
    text = str(v).strip() if isinstance(v, str) else None
    g = _ZONE.fullmatch(text) if text else None
    if g is None or (g.group(1) and (int(g.group(2)) > 14 or int(g.group(3)) > 59)):
        raise ctx.error(field, f"{v!r} is not a time zone: write \"Z\" (UTC) or an offset "
                        'from UTC such as "+01:00"')
    return text


def zone_seconds(text) -> int:
    """Seconds east of UTC of a ``time_zone`` value (None or "Z": 0)."""
    if text is None:
        return 0
    g = _ZONE.fullmatch(str(text).strip())
    if g is None or not g.group(1):
        return 0
    sign = 1 if g.group(1) == "+" else -1
    return sign * (3600 * int(g.group(2)) + 60 * int(g.group(3)))


def mean_origin(geod) -> tuple[float, float, float]:
    """Array centre (mean lat, mean lon, mean alt) of ``(N, 3)`` WGS84 positions."""
    lon = np.asarray(geod[:, 1], float)
    rel = (lon - lon[0] + 180.0) % 360.0 - 180.0  # unwrap across the antimeridian
    lon0 = (lon[0] + rel.mean() + 180.0) % 360.0 - 180.0
    return float(np.mean(geod[:, 0])), float(lon0), float(np.mean(geod[:, 2]))


# ---------------------------------------------------------------- receivers, barriers, sketch

def parse_receivers(ctx, raw, coords, to_local):
    out, seen = [], set()
    for i, r in enumerate(table_array(ctx, raw, "receivers")):
        where = f"receivers[{i}]"
        check_keys(ctx, r, RECEIVER_KEYS, where)
        name = get_str(ctx, r, "name", f"{where}.name", required=True,
                       hint="give each receiver a name").strip()
        if name in seen:
            raise ctx.error(f"{where}.name", f'duplicate receiver name "{name}"')
        seen.add(name)
        if coords == "local":
            pos = position(ctx, r, coords, where, z_default=RECEIVER_HEIGHT_M)
            out.append(dict(name=name, position_m=pos))
        else:  # alt defaults to the array-centre altitude (local z = 0)
            lat, lon, alt = position(ctx, r, coords, where, z_default=np.nan)
            if np.isnan(alt):
                alt = to_local.origin[2]
            enu = to_local(lat, lon, alt)
            out.append(dict(name=name, position_m=enu, geodetic=(lat, lon, alt)))
    return out


def parse_barriers(ctx, raw, coords, to_local):
    out = []
    for i, b in enumerate(table_array(ctx, raw, "barriers")):
        where = f"barriers[{i}]"
        check_keys(ctx, b, BARRIER_KEYS, where)
        label = get_str(ctx, b, "label", f"{where}.label") or f"barrier {i + 1}"
        if "line" not in b:
            raise ctx.error(f"{where}.line", "missing: give the wall as a list of points")
        line = points(ctx, b["line"], f"{where}.line", coords, to_local, min_points=2)
        h = get_number(ctx, b, "height_m", f"{where}.height_m", required=True,
                       hint="give the height of the top of the barrier in metres")
        if h <= 0:
            raise ctx.error(f"{where}.height_m", f"must be above zero, got {h:g}: give the "
                            "height of the top of the barrier in metres")
        out.append(dict(label=label, line_m=line, height_m=h))
    return out


def parse_sketch(ctx, raw, coords, to_local, warnings):
    sk = get_table(ctx, raw, "sketch")
    if sk is None:
        return None
    check_keys(ctx, sk, SKETCH_KEYS, "sketch")
    paths = {}
    for key in ("image", "geojson"):
        s = get_str(ctx, sk, key, f"sketch.{key}")
        paths[key] = ctx.resolve(s) if s is not None else None
        if paths[key] is not None and not paths[key].is_file():
            warnings.append(f"sketch.{key}: file not found: {paths[key]} (maps are drawn "
                            "without it)")
    refs_raw = sk.get("refs", [])
    if not isinstance(refs_raw, list):
        raise ctx.error("sketch.refs", "must be a list of { pixel = [u, v], at = [..] }")
    refs = []
    for k, r in enumerate(refs_raw):
        f = f"sketch.refs[{k}]"
        if not isinstance(r, dict):
            raise ctx.error(f, "must be an inline table { pixel = [u, v], at = [..] }")
        check_keys(ctx, r, ("pixel", "at"), f)
        for key in ("pixel", "at"):
            if key not in r:
                raise ctx.error(f"{f}.{key}", "missing")
        pix = points(ctx, [r["pixel"]], f"{f}.pixel", "local", None, min_points=1)[0]
        at = points(ctx, [r["at"]], f"{f}.at", coords, to_local, min_points=1)[0]
        pix.setflags(write=False)
        at.setflags(write=False)
        refs.append((pix, at))
    if paths["image"] is not None and len(refs) < 2:
        raise ctx.error("sketch.refs", f"{len(refs)} control point(s): placing the image needs "
                        "at least 2 refs (pixel and site position of a point you can see)")
    shapes_raw = sk.get("shapes", [])
    if not isinstance(shapes_raw, list):
        raise ctx.error("sketch.shapes", "must be a list of { label = .., outline = [..] }")
    shapes = []
    for k, s in enumerate(shapes_raw):
        f = f"sketch.shapes[{k}]"
        if not isinstance(s, dict):
            raise ctx.error(f, "must be an inline table { label = .., outline = [[..], ..] }")
        check_keys(ctx, s, ("label", "outline"), f)
        label = get_str(ctx, s, "label", f"{f}.label") or ""
        if "outline" not in s:
            raise ctx.error(f"{f}.outline", "missing: give the outline as a list of points")
        outline = points(ctx, s["outline"], f"{f}.outline", coords, to_local, min_points=2)
        outline.setflags(write=False)
        shapes.append(dict(label=label, outline=outline))
    return dict(image=paths["image"], refs=tuple(refs), shapes=tuple(shapes),
                geojson=paths["geojson"])
