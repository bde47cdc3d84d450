"""``tdoa track`` and ``tdoa map``."""

from __future__ import annotations

import math

import click

from locate.cli.common import (
    FINITE,
    TIME,
    announce,
    check_band,
    check_outputs,
    check_sketch,
    check_span_args,
    draw_map,
    echo,
    geometry_options,
    load,
    parse_band,
    progress_bar,
    resolve_span,
    site_inputs,
    transactional,
    warn,
)
from locate.errors import ConvergenceError, OptionError, TdoaError

__all__ = ["track", "map_command"]


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("--from", "start_s", type=TIME, required=True,
              help="Start of the pass: seconds into the recording, or an ISO 8601 clock time.")
@click.option("--to", "stop_s", type=TIME, required=True,
              help="End of the pass: seconds, or an ISO 8601 clock time.")
@click.option("--window", "window_s", type=FINITE, default=None,
              help="Analysis window, s (default: from the array size and --speed-guess).")
@click.option("--hop", "hop_s", type=FINITE, default=None, help="Window hop, s.")
@click.option("--band", default=None, metavar="LO:HI", help="Analysis band, Hz.")
@geometry_options
@click.option("--model", type=click.Choice(["auto", "straight", "segments", "smooth"]),
              default="auto", show_default=True,
              help="Motion model: chosen by the data (auto), constant velocity, piecewise "
                   "straight with turns, or smooth (constant acceleration per segment).")
@click.option("--segment", "segment_s", type=FINITE, default=None,
              help="Segment length for --model segments, s.")
@click.option("--speed-guess", "speed_guess_mps", type=FINITE, default=20.0, show_default=True,
              help="Rough speed, m/s; sets the default window.")
@click.option("--tone", "tone", default=None, metavar="HZ|auto",
              help="Track this tone (or the strongest, 'auto') for a Doppler speed check.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
              help="Write the track result JSON here.")
@click.option("--map", "map_path", type=click.Path(dir_okay=False), default=None,
              help="Draw the track over the site sketch (PNG, SVG or PDF).")
@click.pass_context
@transactional
def track(ctx, site_path, start_s, stop_s, window_s, hop_s, band, dims, source_z_m,
          sound_speed_mps, model, segment_s, speed_guess_mps, tone, json_path, map_path):
    """Reconstruct a moving source's track (emission-time positions, heading, speed)."""
    try:
        return _track(ctx, site_path, start_s, stop_s, window_s, hop_s, band, dims, source_z_m,
                      sound_speed_mps, model, segment_s, speed_guess_mps, tone, json_path,
                      map_path)
    except (TdoaError, click.exceptions.ClickException, click.exceptions.Abort,
            click.exceptions.Exit):
        raise
    except Exception as exc:  # an internal failure: one line, exit 1, never a traceback
        raise ConvergenceError(
            f"the tracker failed internally ({type(exc).__name__}: {exc}); no result was "
            "written - rerun with --debug and report it") from exc


def _track(ctx, site_path, start_s, stop_s, window_s, hop_s, band, dims, source_z_m,
           sound_speed_mps, model, segment_s, speed_guess_mps, tone, json_path, map_path):
    from locate.accuracy.inputs import declared_sds
    from locate.io.audio import open_recordings
    from locate.results.documents import write_json
    from locate.track.tracker import track_recording, track_to_dict
    from locate.workflows.fixing import (
        add_clock_times,
        conditions_for,
        fix_result,
        resolve_source_height,
    )

    band_hz = parse_band(band)
    # the same height rule as `fix`: given or assumed, with its uncertainty (2-D tracks)
    source_z_m, source_z_sd_m, _ = resolve_source_height(source_z_m, None, dims)
    check_span_args(start_s, stop_s, window_s)
    if not (math.isfinite(speed_guess_mps) and speed_guess_mps > 0):
        raise OptionError(f"--speed-guess must be a positive speed, got {speed_guess_mps:g} m/s",
                          field="--speed-guess")
    if hop_s is not None and hop_s <= 0:
        raise OptionError(f"hop {hop_s:g} s must be positive", field="--hop")
    tone_hz = None if tone is None else ("auto" if tone == "auto" else _float(tone, "--tone"))
    site = load(site_path, dims)
    check_outputs({"--json": json_path, "--map": map_path}, site_inputs(site))
    if map_path:
        check_sketch(site)
    rec = open_recordings(site)
    start_s, stop_s = resolve_span(rec, start_s, stop_s, window_s)
    if window_s is not None and window_s > stop_s - start_s:
        raise OptionError(f"window {window_s:g} s is longer than the span "
                          f"{stop_s - start_s:g} s: shorten --window or widen --from/--to",
                          field="--window")
    check_band(band_hz, rec.sample_rate_hz)
    cond = conditions_for(site, sound_speed_mps)
    if speed_guess_mps >= cond.sound_speed_mps:
        raise OptionError(f"--speed-guess {speed_guess_mps:g} m/s is not below the sound speed "
                          f"({cond.sound_speed_mps:.0f} m/s): a single emission time needs a "
                          "subsonic source", field="--speed-guess")
    signals, _ = rec.read(start_s, stop_s)
    points = [m.position_m for m in site.mics] + [r.position_m for r in site.receivers]
    names = site.mic_names + [r.name for r in site.receivers]
    bearing_from = site.receivers[0].position_m if site.receivers else site.mics[0].position_m
    with progress_bar(ctx, 100, "Tracking") as bar:
        state = {"done": 0}

        def progress(done, total):
            step = int(100 * done / max(total, 1)) - state["done"]
            if step > 0:
                bar.update(step)
                state["done"] += step

        sds = declared_sds(site)
        res = track_recording(signals, rec.sample_rate_hz, site.positions_m,
                              cond.sound_speed_mps, t0_s=start_s, window_s=window_s,
                              hop_s=hop_s, band_hz=band_hz, dims=dims, source_z_m=source_z_m,
                              source_z_sd_m=source_z_sd_m if dims == 2 else None,
                              wind_mps=cond.wind_mps, model=model, segment_s=segment_s,
                              expected_speed_mps=speed_guess_mps, points_m=points,
                              bearing_from_m=bearing_from, tone_hz=tone_hz,
                              nuisance_sds=sds, progress=progress)
    doc = track_to_dict(res, site.mic_names, point_names=names)
    warnings = list(rec.warnings) + list(res.warnings)
    if res.source_height is not None:
        source_z_m = res.source_height["used_z_m"]
    if res.uncertainty.get("timing_only"):
        warnings.append("track uncertainties are " + res.uncertainty["note"])
    result = fix_result(site, cond, [], kind="track", warnings=warnings, dims=dims,
                        source_z_m=source_z_m,
                        extra={"track": doc, "span_s": [start_s, stop_s]})
    add_clock_times(result, rec, site)
    _print_track(ctx, site, cond, doc, bearing_from_name=names[len(site.mics)]
                 if site.receivers else site.mic_names[0])
    for w in result["warnings"]:
        warn(w)
    if json_path:
        write_json(json_path, result)
        announce(ctx, f"Result written to {json_path}")
    if map_path:
        draw_map(site, result, map_path)
        announce(ctx, f"Map written to {map_path}")
    return result


def _float(text, field):
    try:
        value = float(text)
    except ValueError:
        raise OptionError(f"{text!r} is not a number", field=field) from None
    if not math.isfinite(value):
        raise OptionError(f"{text!r} is not a finite number", field=field)
    return value


def _print_track(ctx, site, cond, doc, bearing_from_name):
    pts = doc["points"]
    echo(ctx, f"{site.title}: {len(pts)} track points, sound speed {cond.sound_speed_mps:.2f} m/s")
    model = doc.get("model", "straight")
    red = doc.get("misfit_chi2_reduced")
    echo(ctx, f"Motion model: {model}"
              + (f" (misfit: reduced chi-square {red:.2f})" if red is not None else "")
              + ("  [FLAGGED: the model does not explain the windows]"
                 if doc.get("flagged") else ""))
    if doc.get("heading_deg") is not None:
        echo(ctx, f"Heading {doc['heading_deg']:.1f}° ± {doc['heading_sd_deg']:.1f}° from north, "
                  f"speed {doc['speed_mps']:.2f} ± {doc['speed_sd_mps']:.2f} m/s "
                  f"({doc['speed_mps'] * 3.6:.1f} km/h)")
    elif pts:
        hs = [p["heading_deg"] for p in pts if p.get("heading_deg") is not None]
        vs = [p["speed_mps"] for p in pts if p.get("speed_mps") is not None]
        if hs and vs:
            echo(ctx, f"Heading and speed change along the track (per point in the result): "
                      f"heading {hs[0]:.1f}° → {hs[-1]:.1f}°, speed {min(vs):.2f} to "
                      f"{max(vs):.2f} m/s")
    for t in doc.get("turns", []):
        if t.get("is_turn"):
            echo(ctx, f"  turn of {t['heading_change_deg']:+.0f}° at emission time "
                      f"{t['t_s']:.2f} s")
    note = (doc.get("uncertainty") or {}).get("note")
    if note:
        echo(ctx, f"Uncertainty: {note}")
    hgt = doc.get("source_height")
    if hgt:
        how = ("from the delays" if hgt["from_delays"] else
               f"assumed or given; the delays agree: {hgt['z_m']:.2f} ± {hgt['sd_m']:.2f} m")
        echo(ctx, f"Source height: {hgt['used_z_m']:.2f} ± {hgt['used_sd_m']:.2f} m ({how})")
    if pts:
        lag = max(p["lag_m"] for p in pts)
        ang = max(abs(p["lag_bearing_deg"]) for p in pts)
        echo(ctx, f"Where it was when the sound left vs where it is when heard: up to "
                  f"{lag:.1f} m apart, {ang:.1f}° of bearing seen from {bearing_from_name}")
    for c in doc.get("closest_approach", []):
        echo(ctx, f"  closest to {c['name']}: {c['distance_m']:.1f} m at emission time "
                  f"{c['t_s']:.2f} s (heard {c['t_heard_s']:.2f} s)"
                  + ("" if c.get("within_span", True) else "  [outside the analysed span]"))
    dop = doc.get("doppler")
    if isinstance(dop, dict) and dop.get("speed_mps") is not None:
        echo(ctx, f"Doppler speed {dop['speed_mps']:.2f} ± {dop.get('speed_sd_mps', 0):.2f} "
                  "m/s (independent check)")


@click.command("map")
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.argument("result_path", metavar="RESULT", type=click.Path())
@click.option("-o", "--output", "out_path", type=click.Path(dir_okay=False), required=True,
              help="Map file: PNG, SVG or PDF.")
@click.option("--fix", "fix_no", type=int, default=None,
              help="Draw only this fix (1-based), with its hyperbolae.")
@click.option("--panels", "panels_path", type=click.Path(dir_okay=False), default=None,
              help="Also draw the correlation diagnostics of the fix (needs a result written "
                   "with fix --panels).")
@click.pass_context
@transactional
def map_command(ctx, site_path, result_path, out_path, fix_no, panels_path):
    """Draw a fix or track result over the site sketch."""
    from locate.draw import figures as plot
    from locate.results.documents import check_same_site, read_result, reading_result

    site = load(site_path)
    check_outputs({"--output": out_path, "--panels": panels_path},
                  site_inputs(site) + [result_path])
    result = read_result(result_path, kinds=("fix", "track"))
    check_same_site(site, result, result_path)
    index = None
    if fix_no is not None:
        n = len(result.get("fixes", []))
        if not 1 <= fix_no <= n:
            raise OptionError(f"the result holds {n} fix(es); --fix {fix_no} is not one of "
                              "them", field="--fix")
        index = fix_no - 1
    if site.sketch is not None and site.sketch.image is not None \
            and not site.sketch.image.exists():
        raise OptionError(f"the sketch image {site.sketch.image} does not exist: fix the path "
                          "or remove sketch.image", file=site.path, field="sketch.image")
    notes = []
    with reading_result(result_path):
        fig = plot.map_figure(site, result, warnings=notes, fix_index=index)
        plot.save_figure(fig, out_path)
    for w in notes:
        warn(w)
    announce(ctx, f"Map written to {out_path}")
    if panels_path:
        with reading_result(result_path):
            panels = plot.panels_figure(result, fix_index=index or 0)
        plot.save_figure(panels, panels_path)
        announce(ctx, f"Diagnostics written to {panels_path}")
