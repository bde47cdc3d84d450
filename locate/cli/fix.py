"""``tdoa fix``: locate a stationary source (events, one span, or windows)."""

from __future__ import annotations

import click
import numpy as np

from locate.cli.common import (
    check_band,
    check_span_args,
    draw_panels,
    echo,
    geometry_options,
    load,
    output_options,
    parse_band,
    print_fixes,
    progress_bar,
    same_shape,
    site_inputs,
    span_options,
    warn,
    write_fix_outputs,
)
from locate.cli.field import field_checks, field_options
from locate.errors import NothingFoundError, OptionError


@click.command()
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
@click.option("--source-z-sd", "source_z_sd_m", type=click.FloatRange(min=0.0), default=None,
              help="Uncertainty (one standard deviation, m) of --source-z; default 0.5 m for a "
                   "given height, 0.6 m for the assumed 1 m.  0: the height is exact.")
@field_options
@click.pass_context
def fix(ctx, site_path, start_s, stop_s, band, dims, source_z_m, sound_speed_mps, json_path,
        csv_path, map_path, window_s, hop_s, sweep, threshold_db, panels_path, no_reject,
        geojson_path=None, solve_air=False, solve_wind=False, events_choice=None,
        source_z_sd_m=None):
    """Locate a stationary source: each detected event, one span (--from/--to), or
    sliding windows (--window)."""
    from locate.fix.air_solve import fit_entry
    from locate.fix.air_solve import summary_lines as air_summary
    from locate.io.audio import open_recordings
    from locate.results.documents import check_output_path
    from locate.signal.event_choice import choose_events
    from locate.workflows.fixing import (
        air_fit_extra,
        conditions_for,
        fix_result,
        fix_span,
        plan_spans,
        require_events,
        resolve_source_height,
        scan_events,
    )

    source_z_m, source_z_sd_m, z_basis = resolve_source_height(source_z_m, source_z_sd_m, dims)
    band_hz = parse_band(band)
    check_span_args(start_s, stop_s, window_s)
    from locate.cli.sweep import check_sweep_args, run_sweep
    check_sweep_args(window_s, hop_s, sweep, start_s, solve_air, panels_path)
    site = load(site_path, dims)
    inputs = site_inputs(site)
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
                                            keep_curves=panels_path is not None, t_s=t,
                                            source_z_sd_m=source_z_sd_m)
                if solve_air:
                    fit_entry(entry, fx, ds, site, cond, dims=dims, source_z_m=source_z_m,
                              solve_wind=solve_wind, extra_covariance_s2=air_fit_extra(
                                  site, fx, ds, cond, dims=dims, source_z_sd_m=source_z_sd_m,
                                  solve_wind=solve_wind))
            except NothingFoundError as exc:
                warnings.append(f"span {a:.3f}..{b:.3f} s: {exc.message}")
                bar.update(1)
                continue
            entries.append(entry)
            fixes.append(fx)
            bar.update(1)
    # the reads' channel notes, unless a fix already said the same (its own figures)
    said = ({same_shape(w) for e in entries for w in e["warnings"]}
            | {same_shape(w) for w in warnings})
    warnings.extend(w for w in rec.warnings if same_shape(w) not in said)
    if not entries:
        for w in warnings:
            warn(w)
        raise NothingFoundError("no span gave a usable fix (see the warnings above)")
    result = fix_result(site, cond, entries, warnings=warnings, dims=dims,
                        source_z_m=source_z_m,
                        extra={"source_z_sd_m": source_z_sd_m, "source_z_basis": z_basis}
                        if dims == 2 else None)
    print_fixes(ctx, site, cond, result)
    for line in air_summary(result):
        echo(ctx, line)
    for w in result["warnings"]:
        warn(w)
    write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path)
    if panels_path:
        draw_panels(result, panels_path)
    return result
