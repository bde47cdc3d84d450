"""``tdoa fix``: locate a stationary source (events, one span, or windows)."""

from __future__ import annotations

import click

from locate.cli.common import (
    FINITE,
    announce,
    check_band,
    check_outputs,
    check_sketch,
    check_span_args,
    draw_panels,
    draw_timeline,
    echo,
    geometry_options,
    load,
    output_options,
    parse_band,
    print_fixes,
    progress_bar,
    resolve_span,
    site_inputs,
    span_options,
    timeline_option,
    transactional,
    warn,
    write_fix_outputs,
)
from locate.cli.field import field_checks, field_options
from locate.cli.sources import check_sources_args, run_sources, sources_options
from locate.errors import NothingFoundError, OptionError


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@span_options
@geometry_options
@output_options
@click.option("--window", "window_s", type=FINITE, default=None,
              help="Fix every window of this length (s) across --from/--to (steady source).")
@click.option("--hop", "hop_s", type=FINITE, default=None,
              help="With --window --sweep: step between windows (s; default: the window).")
@click.option("--sweep", is_flag=True,
              help="With --window: a summary on screen and compact JSON (the same windows, "
                   "checks and budget as --window alone); allows --hop.")
@click.option("--threshold", "threshold_db", type=FINITE, default=10.0, show_default=True,
              help="Event detection: dB above the background.")
@click.option("--panels", "panels_path", type=click.Path(dir_okay=False), default=None,
              help="Also draw each pair's correlation and residual (diagnostics figure).")
@click.option("--no-reject", is_flag=True, help="Keep every mic (no integrity test).")
@click.option("--chunk", "chunk_s", type=float, default=None, metavar="SECONDS",
              help="Scan a long deployment for events in time chunks of this length, "
                   "overlapping (--chunk-overlap): same fixes as one run; with --scheduler "
                   "on a Dask cluster.")
@click.option("--chunk-overlap", "chunk_overlap_s", type=float, default=30.0,
              show_default=True, help="With --chunk: seconds scanned either side of a chunk.")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="With --chunk: run the chunks on this Dask scheduler (tcp://host:port); "
                   "its workers must see the files at the same paths.")
@timeline_option
@click.option("--source-z-sd", "source_z_sd_m", type=click.FloatRange(min=0.0), default=None,
              help="Uncertainty (one standard deviation, m) of --source-z; default 0.5 m for a "
                   "given height, 0.6 m for the assumed 1 m.  0: the height is exact.")
@field_options
@sources_options
@click.pass_context
@transactional
def fix(ctx, site_path, start_s, stop_s, band, dims, source_z_m, sound_speed_mps, json_path,
        csv_path, map_path, window_s, hop_s, sweep, threshold_db, panels_path, no_reject,
        chunk_s=None, chunk_overlap_s=30.0, scheduler=None, timeline_path=None,
        geojson_path=None, solve_air=False, solve_wind=False, events_choice=None,
        source_z_sd_m=None, sources="1", sources_map_path=None):
    """Locate a stationary source: each detected event, one span (--from/--to), or
    sliding windows (--window)."""
    from locate.fix.air_solve import summary_lines as air_summary
    from locate.io.audio import open_recordings
    from locate.workflows.fixing import conditions_for, resolve_source_height
    from locate.workflows.locating import locate_recordings

    source_z_m, source_z_sd_m, z_basis = resolve_source_height(source_z_m, source_z_sd_m, dims)
    band_hz = parse_band(band)
    check_span_args(start_s, stop_s, window_s)
    from locate.cli.sweep import check_sweep_args, run_sweep
    check_sweep_args(window_s, hop_s, sweep, start_s, solve_air, panels_path)
    n_sources = check_sources_args(sources, sources_map_path, start_s, window_s, sweep,
                                   solve_air, panels_path, dims)
    site = load(site_path, dims)
    inputs = site_inputs(site)
    check_outputs({"--json": json_path, "--csv": csv_path, "--map": map_path,
                   "--panels": panels_path, "--geojson": geojson_path,
                   "--timeline": timeline_path, "--sources-map": sources_map_path}, inputs)
    if map_path:
        check_sketch(site)
    choice, solve_air = field_checks(site, inputs, geojson_path=geojson_path, solve_air=solve_air,
                                     solve_wind=solve_wind, events_choice=events_choice,
                                     start_s=start_s, dims=dims)
    rec = open_recordings(site)
    start_s, stop_s = resolve_span(rec, start_s, stop_s, window_s)
    check_band(band_hz, rec.sample_rate_hz)
    cond = conditions_for(site, sound_speed_mps)
    if n_sources != 1 or sources_map_path:
        return run_sources(ctx, site, rec, cond, start_s, stop_s, n_sources, band_hz,
                           source_z_m, sound_speed_mps, not no_reject, json_path, csv_path,
                           geojson_path, map_path, sources_map_path)
    if sweep:
        if window_s > stop_s - start_s:
            raise OptionError(f"window {window_s:g} s is longer than the span "
                              f"{stop_s - start_s:g} s", field="--window")
        warnings = list(site.warnings) + list(rec.warnings)
        return run_sweep(ctx, rec, site, cond, start_s, stop_s, window_s, hop_s, band_hz, dims,
                         source_z_m, not no_reject, warnings, json_path, csv_path, geojson_path,
                         map_path, source_z_sd_m=source_z_sd_m)
    if scheduler is not None and chunk_s is None:
        raise OptionError("--scheduler runs the chunks of --chunk: give --chunk SECONDS",
                          field="--scheduler")
    if chunk_s is not None:
        if start_s is not None or window_s is not None or solve_air or choice is not None \
                or panels_path:
            raise OptionError("--chunk scans every event of the recordings: leave out "
                              "--from/--to, --window, --solve-air, --events and --panels",
                              field="--chunk")
        from locate.workflows.chunked import locate_chunked, plan_chunks

        n = len(plan_chunks(rec.start_s, rec.stop_s, rec.sample_rate_hz, chunk_s,
                            chunk_overlap_s))
        try:
            with progress_bar(ctx, n, f"Chunks ({n})") as bar:
                result = locate_chunked(
                    site, rec, chunk_s=chunk_s, overlap_s=chunk_overlap_s,
                    scheduler=scheduler, progress=bar.update, band_hz=band_hz, dims=dims,
                    source_z_m=source_z_m, sound_speed_mps=sound_speed_mps,
                    threshold_db=threshold_db, reject=not no_reject)
        except NothingFoundError as exc:
            for w in getattr(exc, "warnings", ()):
                warn(w)
            raise
        print_fixes(ctx, site, cond, result)
        for w in result["warnings"]:
            warn(w)
        write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path)
        if timeline_path:
            draw_timeline(ctx, rec, result, timeline_path)
        return result
    try:
        result = locate_recordings(
            site, rec, start_s=start_s, stop_s=stop_s, window_s=window_s, band_hz=band_hz,
            dims=dims, source_z_m=source_z_m, source_z_sd_m=source_z_sd_m,
            source_z_basis=z_basis, sound_speed_mps=sound_speed_mps,
            threshold_db=threshold_db, reject=not no_reject,
            keep_curves=panels_path is not None, solve_air=solve_air, solve_wind=solve_wind,
            events_choice=choice,
            progress=lambda label, total: progress_bar(ctx, total, label))
    except NothingFoundError as exc:
        for w in getattr(exc, "warnings", ()):
            warn(w)
        raise
    print_fixes(ctx, site, cond, result)
    for line in air_summary(result):
        echo(ctx, line)
    for w in result["warnings"]:
        warn(w)
    write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path)
    if panels_path:
        draw_panels(result, panels_path)
        announce(ctx, f"Diagnostics written to {panels_path}")
    if timeline_path:
        draw_timeline(ctx, rec, result, timeline_path)
    return result
