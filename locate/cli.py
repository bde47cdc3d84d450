"""The ``tdoa`` command line (also ``python -m locate``).

Each command parses its options, calls the core, writes its outputs atomically and prints a
short summary.  Problems with the input are one line on stderr and exit code 2 (1 when the
input is valid but nothing usable was found); ``--debug`` shows the traceback.
"""

from __future__ import annotations

import re
import sys
import traceback
from pathlib import Path

import click
import numpy as np

from locate import __version__
from locate.cli_field import field_checks, field_options
from locate.errors import NothingFoundError, OptionError, TdoaError

__all__ = ["cli", "main", "DEMO_STEPS"]

DEMO_STEPS: list = []
"""(name, callable(ctx, demo_dir, out_dir)) steps that ``tdoa demo`` runs after the fix."""


# ----------------------------------------------------------------------------- helpers

def parse_band(value):
    """``"LO:HI"`` in Hz -> (lo, hi); OptionError naming ``--band`` otherwise."""
    if value is None:
        return None
    try:
        lo_s, hi_s = str(value).split(":")
        lo, hi = float(lo_s), float(hi_s)
    except ValueError:
        raise OptionError(f"{value!r} is not LO:HI in Hz (e.g. 100:4000)",
                          field="--band") from None
    if not (np.isfinite(lo) and np.isfinite(hi)) or lo < 0 or hi <= lo:
        raise OptionError(f"{value!r}: the low edge must be >= 0 and below the high edge",
                          field="--band")
    return lo, hi


def check_band(band, sample_rate_hz):
    if band is not None and band[1] > sample_rate_hz / 2:
        raise OptionError(f"high edge {band[1]:g} Hz is above the Nyquist frequency "
                          f"{sample_rate_hz / 2:g} Hz of the recordings", field="--band")


def echo(ctx, text="", **kw):
    if not ctx.obj.get("quiet"):
        click.echo(text, **kw)


def warn(message):
    click.echo(f"tdoa: warning: {message}", err=True)


def progress_bar(ctx, length, label):
    """A click progress bar on a terminal; a no-op object in pipes or with --quiet."""
    show = sys.stderr.isatty() and not ctx.obj.get("quiet")
    if show:
        return click.progressbar(length=max(int(length), 1), label=label, file=sys.stderr)

    class _Quiet:
        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return False

        def update(self, n):
            pass

    return _Quiet()


def load(site_path, dims=2, require_audio=True):
    from locate.site import load_site
    return load_site(site_path, dims=dims, require_audio=require_audio)


def span_options(f):
    f = click.option("--from", "start_s", type=float, default=None,
                     help="Start of the span, seconds into the recording.")(f)
    f = click.option("--to", "stop_s", type=float, default=None,
                     help="End of the span, seconds into the recording.")(f)
    f = click.option("--band", default=None, metavar="LO:HI",
                     help="Analysis band in Hz (default: where the signal stands above the "
                          "noise).")(f)
    return f


def geometry_options(f):
    f = click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True,
                     help="2: horizontal fix at a given source height; 3: full 3-D fix.")(f)
    f = click.option("--source-z", "source_z_m", type=float, default=0.0, show_default=True,
                     help="Source height for 2-D fixes, metres (same datum as the mics).")(f)
    f = click.option("--sound-speed", "sound_speed_mps", type=float, default=None,
                     help="Override the sound speed from the site's air, m/s.")(f)
    return f


def output_options(f):
    f = click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
                     help="Write the result JSON here.")(f)
    f = click.option("--csv", "csv_path", type=click.Path(dir_okay=False), default=None,
                     help="Write one CSV row per fix here.")(f)
    f = click.option("--map", "map_path", type=click.Path(dir_okay=False), default=None,
                     help="Draw the result over the site sketch (PNG, SVG or PDF).")(f)
    return f


def _check_span_args(start_s, stop_s, window_s=None):
    if (start_s is None) != (stop_s is None):
        raise OptionError("give both --from and --to (or neither, to detect events)",
                          field="--from" if start_s is None else "--to")
    if start_s is not None and (start_s < 0 or stop_s <= start_s):
        raise OptionError(f"the span {start_s:g}..{stop_s:g} s is empty or negative: --from "
                          "must be >= 0 and before --to", field="--from")
    if window_s is not None and window_s <= 0:
        raise OptionError(f"window {window_s:g} s must be positive", field="--window")


def _site_inputs(site):
    files = [site.path, site.recording_file] + [m.file for m in site.mics]
    return [f for f in files if f is not None]


# ----------------------------------------------------------------------------- the group

@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tdoa")
@click.option("--debug", is_flag=True, help="Show a traceback on error.")
@click.option("--quiet", "-q", is_flag=True, help="Print nothing but warnings and errors.")
@click.pass_context
def cli(ctx, debug, quiet):
    """Find where a sound came from, using time differences of arrival at synchronised
    microphones (see docs/walkthrough.md)."""
    ctx.ensure_object(dict)
    ctx.obj.update(debug=debug, quiet=quiet)


@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True)
@click.pass_context
def check(ctx, site_path, dims):
    """Validate the site file and recordings; print geometry and warnings."""
    from locate.audio import open_recordings
    from locate.pipeline import conditions_for

    site = load(site_path, dims)
    rec = open_recordings(site)
    cond = conditions_for(site)
    pos = site.positions_m
    span = np.max(np.linalg.norm(pos[:, None, :2] - pos[None, :, :2], axis=-1))
    echo(ctx, f"Site      {site.title}  ({site.path.name}, coordinates {site.coordinates})")
    echo(ctx, f"Air       {cond.temperature_c:g} degC, {cond.relative_humidity:g} % RH, "
              f"sound speed {cond.sound_speed_mps:.2f} m/s; wind {cond.wind_speed_mps:g} m/s "
              f"from {cond.wind_from_deg:g} deg")
    echo(ctx, f"Audio     {rec.sample_rate_hz:g} Hz, {rec.duration_s:.2f} s common to all mics")
    echo(ctx, f"Array     {len(pos)} mics, widest spacing {span:.1f} m "
              f"(largest delay {span / cond.sound_speed_mps * 1e3:.1f} ms)")
    for (name, path, ch), m in zip(rec.files, site.mics):
        x, y, z = m.position_m
        echo(ctx, f"  {name:<8} x {x:9.2f}  y {y:9.2f}  z {z:6.2f} m   {Path(path).name} "
                  f"ch {ch}  offset {m.offset_s:+.6f} s")
    opened = list(rec.warnings)
    stop_s = min(rec.stop_s, rec.start_s + CHECK_SCAN_S)  # dead, silent or clipped channels
    with progress_bar(ctx, stop_s - rec.start_s, "Reading the recordings") as bar:
        for _t0, signals, _ in rec.blocks(60.0, 0.0, rec.start_s, stop_s, reuse=True):
            bar.update(signals.shape[1] / rec.sample_rate_hz)
    found = [w for w in rec.warnings if w not in opened]
    scanned = (f"the first {stop_s - rec.start_s:.0f} s" if stop_s < rec.stop_s
               else "all of it")
    echo(ctx, f"Signals   read {scanned}: "
              + (f"{len(found)} channel problem(s), see the warnings" if found else
                 "no dead, silent or clipped channel"))
    for w in list(site.warnings) + list(rec.warnings):
        warn(w)
    echo(ctx, "Site file and recordings look usable." if not found else
         "Site file and recordings are readable; mind the channel warnings before a fix.")


@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@span_options
@geometry_options
@output_options
@click.option("--window", "window_s", type=float, default=None,
              help="Fix every window of this length (s) across --from/--to (steady source).")
@click.option("--hop", "hop_s", type=float, default=None,
              help="With --window --sweep: step between windows (s; default: the window).")
@click.option("--sweep", is_flag=True,
              help="With --window: the fast path for one steady source over a long span "
                   "(windowed delays, batched locator; no per-window echo check or budget) "
                   "and a summary on screen.")
@click.option("--threshold", "threshold_db", type=float, default=10.0, show_default=True,
              help="Event detection: dB above the background.")
@click.option("--panels", "panels_path", type=click.Path(dir_okay=False), default=None,
              help="Also draw each pair's correlation and residual (diagnostics figure).")
@click.option("--no-reject", is_flag=True, help="Keep every mic (no integrity test).")
@field_options
@click.pass_context
def fix(ctx, site_path, start_s, stop_s, band, dims, source_z_m, sound_speed_mps, json_path,
        csv_path, map_path, window_s, hop_s, sweep, threshold_db, panels_path, no_reject,
        geojson_path=None, solve_air=False, solve_wind=False, events_choice=None):
    """Locate a stationary source: each detected event, one span (--from/--to), or
    sliding windows (--window)."""
    from locate.airfit import fit_entry
    from locate.airfit import summary_lines as air_summary
    from locate.audio import open_recordings
    from locate.event_choice import choose_events
    from locate.pipeline import (
        conditions_for,
        fix_result,
        fix_span,
        plan_spans,
        require_events,
        scan_events,
    )
    from locate.results import check_output_path

    band_hz = parse_band(band)
    _check_span_args(start_s, stop_s, window_s)
    from locate.cli_sweep import check_sweep_args, run_sweep
    check_sweep_args(window_s, hop_s, sweep, start_s, solve_air, panels_path)
    site = load(site_path, dims)
    inputs = _site_inputs(site)
    for p, opt in ((json_path, "--json"), (csv_path, "--csv"), (map_path, "--map"),
                   (panels_path, "--panels")):
        check_output_path(p, inputs, option=opt)
    choice, solve_air = field_checks(site, inputs, geojson_path=geojson_path, solve_air=solve_air,
                                     solve_wind=solve_wind, events_choice=events_choice,
                                     start_s=start_s, dims=dims)
    rec = open_recordings(site)
    check_band(band_hz, rec.sample_rate_hz)
    cond = conditions_for(site, sound_speed_mps)
    warnings = list(site.warnings) + list(rec.warnings)
    if start_s is None:
        with progress_bar(ctx, rec.duration_s, "Scanning for events") as bar:
            events = scan_events(rec, site.positions_m, cond, band_hz=band_hz,
                                 threshold_db=threshold_db, progress=bar.update)
        require_events(events, rec.start_s, rec.stop_s)
        events, notes = choose_events(events, choice)
        warnings.extend(notes)
        spans = plan_spans(events, rec, site.positions_m, cond)
        times = [float(np.nanmin(ev.onset_s)) for ev in events]
    elif window_s is not None:
        if window_s > stop_s - start_s:
            raise OptionError(f"window {window_s:g} s is longer than the span "
                              f"{stop_s - start_s:g} s", field="--window")
        edges = np.arange(start_s, stop_s - window_s + 1e-9, window_s)
        spans = [(float(a), float(a + window_s)) for a in edges]
        times = [a for a, _ in spans]
    else:
        spans, times = [(start_s, stop_s)], [start_s]
    entries, fixes = [], []
    if sweep:
        return run_sweep(ctx, rec, site, cond, start_s, stop_s, window_s, hop_s, band_hz, dims,
                         source_z_m, not no_reject, warnings, json_path, csv_path, geojson_path,
                         map_path)
    with progress_bar(ctx, len(spans), "Locating") as bar:
        for (a, b), t in zip(spans, times):
            try:
                entry, fx, ds, _ = fix_span(rec, site, cond, a, b, band_hz=band_hz, dims=dims,
                                            source_z_m=source_z_m, reject=not no_reject,
                                            keep_curves=panels_path is not None, t_s=t)
                if solve_air:
                    fit_entry(entry, fx, ds, site, cond, dims=dims, source_z_m=source_z_m,
                              solve_wind=solve_wind)
            except NothingFoundError as exc:
                warnings.append(f"span {a:.3f}..{b:.3f} s: {exc.message}")
                bar.update(1)
                continue
            entries.append(entry)
            fixes.append(fx)
            bar.update(1)
    # the reads' channel notes, unless a fix already said the same (its own figures)
    said = {_shape(w) for e in entries for w in e["warnings"]} | {_shape(w) for w in warnings}
    warnings.extend(w for w in rec.warnings if _shape(w) not in said)
    if not entries:
        for w in warnings:
            warn(w)
        raise NothingFoundError("no span gave a usable fix (see the warnings above)")
    result = fix_result(site, cond, entries, warnings=warnings, dims=dims,
                        source_z_m=source_z_m)
    _print_fixes(ctx, site, cond, result)
    for line in air_summary(result):
        echo(ctx, line)
    for w in result["warnings"]:
        warn(w)
    write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path)
    if panels_path:
        _draw_panels(result, panels_path)
    return result


def write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path, *,
                      compact=False):
    """The files a fix result asked for: JSON (compact for sweeps), CSV, GeoJSON, map."""
    from locate.gis import write_geojson
    from locate.results import fixes_csv, write_atomic, write_json

    if json_path:
        write_json(json_path, result, indent=None if compact else 1)
        echo(ctx, f"Result written to {json_path}")
    if csv_path:
        write_atomic(csv_path, fixes_csv(result))
    if geojson_path:
        write_geojson(geojson_path, result, site.origin_wgs84)
        echo(ctx, f"GeoJSON written to {geojson_path}")
    if map_path:
        _draw_map(site, result, map_path)
        echo(ctx, f"Map written to {map_path}")


def _print_fixes(ctx, site, cond, result):
    echo(ctx, f"{site.title}: {len(site.mics)} mics, sound speed "
              f"{cond.sound_speed_mps:.2f} m/s ({cond.temperature_c:g} degC, "
              f"{cond.relative_humidity:g} % RH)"
              + (f", wind {cond.wind_speed_mps:g} m/s from {cond.wind_from_deg:g} deg"
                 if cond.wind_speed_mps else ""))
    for k, f in enumerate(result["fixes"], 1):
        x, y, z = f["position_m"]
        e = f["ellipse95"]
        height = f"z {z:.2f} m (solved)" if f["dims"] == 3 else f"z {z:.2f} m (given)"
        echo(ctx, f"#{k} heard at {f['t_s']:.3f} s  ->  x {x:.2f} m, y {y:.2f} m, {height}")
        echo(ctx, f"   95 % ellipse {_len(e['semi_major_m'])} x {_len(e['semi_minor_m'])} "
                  f"(half-axes), long axis toward {e['azimuth_deg']:.0f} deg; timing residual "
                  f"{f['residual_rms_s'] * 1e6:.1f} us; mics used {' '.join(f['used_mics'])}"
                  + (f"; rejected {' '.join(f['rejected_mics'])}" if f["rejected_mics"] else ""))
        if f.get("uncertainty_budget"):
            from locate.budget import budget_summary
            echo(ctx, "   " + budget_summary(f["uncertainty_budget"]))
        for w in f["warnings"]:
            warn(f"#{k}: {w}")


def _shape(message):
    """A warning with its numbers blanked: the same note about other figures compares equal."""
    return re.sub(r"[-+]?\d+(\.\d+)?", "#", message)


CHECK_SCAN_S = 300.0  # tdoa check reads this much of the recordings for channel problems


def _len(v):
    if v is None or not np.isfinite(v):
        return "unbounded"
    if v < 1e-4:
        return f"{v * 1e6:.1f} um"
    if v < 0.01:
        return f"{v * 1000:.1f} mm"
    return f"{v * 100:.1f} cm" if v < 1 else f"{v:.2f} m"


def _draw_map(site, result, path):
    from locate import plot
    fig = plot.map_figure(site, result)
    plot.save_figure(fig, path)


def _draw_panels(result, path):
    from locate import plot
    fig = plot.panels_figure(result)
    plot.save_figure(fig, path)


@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@span_options
@click.option("--threshold", "threshold_db", type=float, default=10.0, show_default=True,
              help="dB above the background for a frame to count as active.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None)
@click.pass_context
def events(ctx, site_path, start_s, stop_s, band, threshold_db, json_path):
    """List detected events with time, duration, level and how many mics heard them."""
    from locate.audio import open_recordings
    from locate.pipeline import conditions_for, fix_result, require_events, scan_events
    from locate.results import check_output_path, write_json

    band_hz = parse_band(band)
    if start_s is not None or stop_s is not None:
        _check_span_args(start_s, stop_s)
    site = load(site_path)
    check_output_path(json_path, _site_inputs(site))
    rec = open_recordings(site)
    check_band(band_hz, rec.sample_rate_hz)
    cond = conditions_for(site)
    a = rec.start_s if start_s is None else start_s
    b = rec.stop_s if stop_s is None else stop_s
    with progress_bar(ctx, b - a, "Scanning for events") as bar:
        found = scan_events(rec, site.positions_m, cond, band_hz=band_hz, start_s=a, stop_s=b,
                            threshold_db=threshold_db, progress=bar.update)
    require_events(found, a, b)
    rows = [ev.to_dict(site.mic_names) for ev in found]
    echo(ctx, f"{len(rows)} event(s) in {a:.2f}..{b:.2f} s")
    echo(ctx, f"{'#':>3} {'first heard':>12} {'length':>8} {'above bg':>9} {'mics':>5}  first mic")
    for k, r in enumerate(rows, 1):
        echo(ctx, f"{k:>3} {r['t_s']:>10.3f} s {r['duration_s']:>6.3f} s {r['level_db']:>6.1f} dB "
                  f"{r['n_mics']:>5}  {r['first_mic']}")
    for w in rec.warnings:
        warn(w)
    if json_path:
        result = fix_result(site, cond, [], kind="events", extra={"events": rows},
                            warnings=rec.warnings)
        write_json(json_path, result)
    return rows


@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.argument("result_path", metavar="RESULT", type=click.Path())
@click.option("--fix", "fix_no", type=int, default=None,
              help="Only this fix of the result (1-based; default: every fix).")
@click.option("--hemisphere", is_flag=True,
              help="Source on hard ground radiating into a half space (8 dB, not 11 dB).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None)
@click.pass_context
def level(ctx, site_path, result_path, fix_no, hemisphere, json_path):
    """Source sound power per octave band, and the level at the site's named receivers."""
    from locate.audio import open_recordings
    from locate.levelrun import level_for_fix
    from locate.pipeline import conditions_for, fix_result
    from locate.results import check_output_path, read_result, write_json

    site = load(site_path)
    check_output_path(json_path, _site_inputs(site) + [result_path])
    result = read_result(result_path, kinds=("fix",))
    _check_same_site(site, result, result_path)
    fixes = result.get("fixes", [])
    if fix_no is not None:
        if not 1 <= fix_no <= len(fixes):
            raise OptionError(f"the result holds {len(fixes)} fix(es); --fix {fix_no} is not "
                              "one of them", field="--fix")
        chosen = [(fix_no, fixes[fix_no - 1])]
    else:
        chosen = list(enumerate(fixes, 1))
    rec = open_recordings(site)
    cond = conditions_for(site, result.get("sound_speed_mps"))
    out = []
    for k, entry in chosen:
        lev = level_for_fix(rec, site, cond, entry, hemisphere=hemisphere,
                            result_path=result_path)
        lev["fix"] = k
        out.append(lev)
        unit = "dB" if lev["calibrated"] else "dBFS-rel"
        echo(ctx, f"#{k} at ({entry['position_m'][0]:.1f}, {entry['position_m'][1]:.1f}) m: "
                  f"sound power {_db(lev['source_lwa_db'])} {unit}(A) "
                  f"(+-{lev['lw_position_sd_db']:.1f} dB from the position), averaged over "
                  f"the {lev['active_duration_s']:.3g} s it sounds")
        echo(ctx, "   band Hz   " + " ".join(f"{b:>6}" for b in lev["bands_hz"]))
        echo(ctx, "   Lw        " + " ".join(f"{_db(v):>6}" for v in lev["source_lw_db"]))
        echo(ctx, "   mic spread" + " ".join(f"{_db(v):>6}" for v in lev["mic_spread_db"]))
        for r in lev["receivers"]:
            screen = max((v for v in r["barrier_db"] if v is not None), default=0.0)
            echo(ctx, f"   at {r['name']} ({r['distance_m']:.0f} m): {_db(r['lpa_db'])} "
                      f"{unit}(A), barrier up to {_db(screen)} dB")
        for note in lev.get("notes", []):
            warn(f"#{k}: {note}")
    echo(ctx, "Screening estimate only: ground effect, meteorology and reflections are not "
              "modelled; not a compliance measurement.")
    if json_path:
        doc = fix_result(site, cond, [], kind="level", warnings=rec.warnings,
                         extra={"levels": out})
        if len(out) == 1:
            doc.update({k: v for k, v in out[0].items() if k != "kind"})
        doc["cautions"] = out[0]["cautions"] if out else doc["cautions"]
        write_json(json_path, doc)
    return out


def _db(v):
    return "  --" if v is None else f"{v:.1f}"


def _check_same_site(site, result, result_path):
    from locate.errors import ResultFileError
    names = [m.get("name") for m in result.get("mics", [])]
    if names and names != site.mic_names:
        raise ResultFileError(f"its mics ({', '.join(map(str, names))}) are not this site's "
                              f"({', '.join(site.mic_names)}): was it made from another site "
                              "file?", file=result_path, field="mics")
    from locate.results import check_mic_positions
    check_mic_positions(site, result, result_path)


@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("-o", "--output", "out_path", type=click.Path(dir_okay=False), default=None,
              help="Planning map (PNG, SVG or PDF).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None)
@click.option("--timing-sd", "timing_sd_s", type=float, default=None,
              help="Expected arrival-time accuracy per mic, seconds (e.g. 2e-5).")
@click.option("--band", default=None, metavar="LO:HI",
              help="Predict the timing from the source band (with --snr, --duration).")
@click.option("--snr", "snr_db", type=float, default=None, help="In-band SNR, dB.")
@click.option("--duration", "duration_s", type=float, default=None,
              help="Length of the analysed sound, s.")
@click.option("--grid-step", "grid_step_m", type=float, default=None)
@click.option("--extent", default=None, metavar="X0:X1:Y0:Y1", help="Map area, metres.")
@click.option("--candidates", default="auto", show_default=True,
              type=click.Choice(["auto", "site", "grid", "none"]),
              help="Where a new mic may go.")
@click.option("--region", default="auto", show_default=True,
              type=click.Choice(["auto", "polygon", "receivers", "extent"]),
              help="Where accuracy matters.")
@click.option("--objective", default="worst", show_default=True,
              type=click.Choice(["worst", "mean"]))
@click.option("--propose", "n_propose", type=click.IntRange(0, 10), default=1, show_default=True)
@click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True)
@click.option("--source-z", "source_z_m", type=float, default=0.0, show_default=True)
@click.pass_context
def plan(ctx, site_path, out_path, json_path, timing_sd_s, band, snr_db, duration_s,
         grid_step_m, extent, candidates, region, objective, n_propose, dims, source_z_m):
    """Expected 95 % ellipse size over the site for the mic layout; best next mic(s)."""
    from locate.plan import plan_site
    from locate.results import check_output_path, write_json

    band_hz = parse_band(band)
    site = load(site_path, dims, require_audio=False)
    for p, opt in ((out_path, "--output"), (json_path, "--json")):
        check_output_path(p, _site_inputs(site), option=opt)
    ext = None
    if extent is not None:
        try:
            ext = tuple(float(v) for v in extent.split(":"))
            assert len(ext) == 4 and ext[0] < ext[1] and ext[2] < ext[3]
        except (ValueError, AssertionError):
            raise OptionError(f"{extent!r} is not X0:X1:Y0:Y1 with X0 < X1 and Y0 < Y1",
                              field="--extent") from None
    if timing_sd_s is None and band_hz is None:
        timing_sd_s = 2e-5
        echo(ctx, "No timing given: assuming 20 us per mic (use --timing-sd or "
                  "--band/--snr/--duration).")
    res = plan_site(site, timing_sd_s=timing_sd_s, band_hz=band_hz, snr_db=snr_db,
                    duration_s=duration_s, grid_step_m=grid_step_m, extent_m=ext,
                    candidates=None if candidates == "none" else candidates, region=region,
                    dims=dims, source_z_m=source_z_m, objective=objective,
                    n_propose=n_propose if candidates != "none" else 0)
    doc = res.to_dict()
    echo(ctx, _plan_summary(doc))
    if json_path:
        write_json(json_path, doc)
    if out_path:
        from locate import plot
        from locate.plan_plot import plan_figure
        plot.save_figure(plan_figure(res, site), out_path)
        echo(ctx, f"Planning map written to {out_path}")
    return doc


def _plan_summary(doc):
    lines = [f"Locatable: {100 * doc.get('locatable_fraction', 0):.0f} % of the map area "
             f"(95 % semi-major below {_len(doc.get('limit_m'))})"]
    for r in doc.get("receivers", []) or []:
        if isinstance(r, dict) and "name" in r:
            val = r.get("semi_major_m")
            lines.append(f"  at {r['name']}: expected 95 % semi-major {_len(val)}")
    for p in doc.get("proposals", []) or []:
        pos = p["position_m"]
        lines.append(f"Proposed next mic {p['name']} at ({pos[0]:.1f}, {pos[1]:.1f}) m: "
                     f"{doc.get('objective', 'worst')} semi-major over the region "
                     f"{_len(p['metric_before_m'])} -> {_len(p['metric_after_m'])} "
                     f"({p['factor']:.1f}x better)")
    return "\n".join(lines)


@cli.command()
@click.argument("out_dir", metavar="DIR", type=click.Path(file_okay=False), default="tdoa-demo")
@click.pass_context
def demo(ctx, out_dir):
    """Run the whole job on the bundled demo recordings and write results + maps to DIR."""
    from locate.demo import run_demo
    run_demo(ctx, Path(out_dir))


# ----------------------------------------------------------------------------- sync

@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("--at", "at", required=True, metavar="X,Y[,Z]",
              help="Where the reference sound was made, in the site's frame: x,y[,z] in metres "
                   "for a local site, lat,lon[,alt] in degrees (alt: ellipsoidal height, m) for "
                   "a wgs84 site. The height defaults to the mean mic height.")
@click.option("--from", "start_s", type=float, required=True,
              help="Start of a span holding the reference sound at every mic, seconds "
                   "(current clocks).")
@click.option("--to", "stop_s", type=float, required=True, help="End of that span, seconds.")
@click.option("--at2", default=None, metavar="X,Y[,Z]",
              help="A second reference sound (same frame as --at), well apart in time: also "
                   "fits each mic's clock drift.")
@click.option("--from2", "start2_s", type=float, default=None, help="Span of the second sound.")
@click.option("--to2", "stop2_s", type=float, default=None, help="End of that span.")
@click.option("--at-sd", "at_sd_m", type=float, default=0.0, show_default=True,
              help="How well the reference points are known, metres per axis.")
@click.option("--band", default=None, metavar="LO:HI", help="Analysis band in Hz.")
@click.option("-o", "--output", "out_path", required=True, type=click.Path(dir_okay=False),
              help="The new site file to write (never the input).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
              help="Also write the calibration (offsets, drifts, uncertainties) as JSON.")
@click.pass_context
def sync(ctx, site_path, at, start_s, stop_s, at2, start2_s, stop2_s, at_sd_m, band, out_path,
         json_path):
    """Per-mic clock offsets (and drifts, given two reference sounds) from a sound made at a
    known point; writes a new site file with offset_s filled in."""
    from locate.audio import open_recordings
    from locate.pipeline import conditions_for
    from locate.results import check_output_path, write_atomic, write_json
    from locate.site import dump_site_toml
    from locate.sync_site import (
        calibrate,
        parse_point,
        summary_lines,
        sync_report,
        synced_site_raw,
    )

    band_hz = parse_band(band)
    _check_span_args(start_s, stop_s)
    second = (at2, start2_s, stop2_s)
    if any(v is not None for v in second) and not all(v is not None for v in second):
        raise OptionError("a second reference sound needs all of --at2, --from2 and --to2",
                          field="--at2")
    if at2 is not None:
        _check_span_args(start2_s, stop2_s)
    if at_sd_m < 0:
        raise OptionError(f"{at_sd_m:g} m: must be zero or positive", field="--at-sd")
    site = load(site_path)
    if Path(out_path).resolve() == site.path:
        raise OptionError("is the input site file: give a new file name (the input is never "
                          "overwritten)", file=out_path, field="-o")
    inputs = _site_inputs(site)
    check_output_path(out_path, inputs, option="-o")
    check_output_path(json_path, inputs + [Path(out_path)], option="--json")
    points = [parse_point(at, site, option="--at")]
    spans = [(start_s, stop_s)]
    if at2 is not None:
        points.append(parse_point(at2, site, option="--at2"))
        spans.append((start2_s, stop2_s))
    rec = open_recordings(site)
    check_band(band_hz, rec.sample_rate_hz)
    cond = conditions_for(site)
    fit, reports = calibrate(site, rec, cond, spans, points, band_hz=band_hz, point_sd_m=at_sd_m)
    write_atomic(out_path, dump_site_toml(synced_site_raw(site, fit, out_path)))
    load(out_path)  # the new file must read back
    for line in summary_lines(site, fit):
        echo(ctx, line)
    report = sync_report(site, cond, fit, reports)
    for w in dict.fromkeys(report["warnings"] + list(rec.warnings)):
        warn(w)
    if json_path:
        write_json(json_path, report)
    echo(ctx, f"New site file written to {out_path}")
    return report


# ----------------------------------------------------------------------------- report

@cli.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.argument("result_paths", metavar="RESULT.json...", nargs=-1, required=True,
                type=click.Path())
@click.option("-o", "--output", "out_path", required=True, type=click.Path(dir_okay=False),
              help="report.html (one self-contained page) or report.pdf (needs Chromium).")
@click.option("--title", default=None, help="Report title (default: the site's title).")
@click.pass_context
def report(ctx, site_path, result_paths, out_path, title):
    """A survey report for a client: set-up, maps, results, levels, methods and cautions,
    from the site file and its fix, track and level results."""
    from locate.report import make_report

    path = make_report(site_path, list(result_paths), out_path, title=title)
    echo(ctx, f"Report written to {path}")
    return path


# Commands defined in their own modules register themselves on the group when imported.
from locate import cli_batch, cli_maps  # noqa: E402,F401
from locate.report import report_demo_step  # noqa: E402

DEMO_STEPS.append(("report", report_demo_step))

# ----------------------------------------------------------------------------- entry point

def main(argv=None):
    """Console entry point: turns user-facing errors into one line and an exit code."""
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    try:
        cli.main(args=args, prog_name="tdoa", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("tdoa: interrupted; no partial result was written", err=True)
        sys.exit(130)
    except click.exceptions.ClickException as exc:
        exc.show()
        sys.exit(exc.exit_code)
    except TdoaError as exc:
        if debug:
            traceback.print_exc()
        click.echo(f"tdoa: error: {exc}", err=True)
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        click.echo("tdoa: interrupted; no partial result was written", err=True)
        sys.exit(130)
    except click.exceptions.Exit as exc:
        sys.exit(exc.exit_code)
    sys.exit(0)


if __name__ == "__main__":  # pragma: no cover
    main()
