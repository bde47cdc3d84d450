"""``tdoa events``: list detected events."""

from __future__ import annotations

import click

from locate.cli.common import (
    FINITE,
    announce,
    check_band,
    check_outputs,
    check_span_args,
    draw_timeline,
    echo,
    load,
    parse_band,
    progress_bar,
    resolve_span,
    site_inputs,
    span_options,
    timeline_option,
    transactional,
    warn,
)


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@span_options
@click.option("--threshold", "threshold_db", type=FINITE, default=10.0, show_default=True,
              help="dB above the background for a frame to count as active.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
              help="Write the list of events as a result JSON here.")
@timeline_option
@click.pass_context
@transactional
def events(ctx, site_path, start_s, stop_s, band, threshold_db, json_path, timeline_path=None):
    """List detected events with time, duration, level and how many mics heard them."""
    from locate.io.audio import open_recordings
    from locate.results.documents import write_json
    from locate.workflows.locating import list_events

    band_hz = parse_band(band)
    if start_s is not None or stop_s is not None:
        check_span_args(start_s, stop_s)
    site = load(site_path)
    check_outputs({"--json": json_path, "--timeline": timeline_path}, site_inputs(site))
    rec = open_recordings(site)
    start_s, stop_s = resolve_span(rec, start_s, stop_s)
    check_band(band_hz, rec.sample_rate_hz)
    result = list_events(site, rec, start_s=start_s, stop_s=stop_s, band_hz=band_hz,
                         threshold_db=threshold_db,
                         progress=lambda label, total: progress_bar(ctx, total, label))
    rows = result["events"]
    a, b = result["span_s"]
    echo(ctx, f"{len(rows)} event(s) in {a:.2f}..{b:.2f} s"
              + (f" ({result['span_utc'][0]} .. {result['span_utc'][1]})"
                 if result.get("span_utc") else ""))
    clock = any(r.get("t_utc") for r in rows)
    echo(ctx, f"{'#':>3} {'first heard':>12} {'length':>8} {'over noise':>10} {'mics':>5}"
              "  first mic"
              + ("  clock time (UTC)" if clock else ""))
    for k, r in enumerate(rows, 1):
        echo(ctx, f"{k:>3} {r['t_s']:>10.3f} s {r['duration_s']:>6.3f} s "
                  f"{r['level_db']:>7.1f} dB "
                  f"{r['n_mics']:>5}  {r['first_mic']}"
                  + (f"  {r['t_utc']}" if r.get("t_utc") else ""))
    for w in rec.warnings:
        warn(w)
    if json_path:
        write_json(json_path, result)
        announce(ctx, f"Result written to {json_path}")
    if timeline_path:
        draw_timeline(ctx, rec, result, timeline_path)
    return rows
