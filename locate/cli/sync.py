"""``tdoa sync``: per-mic clock offsets from a sound made at a known point."""

from __future__ import annotations

from pathlib import Path

import click

from locate.cli.common import (
    FINITE,
    announce,
    check_band,
    check_outputs,
    check_span_args,
    echo,
    load,
    parse_band,
    progress_bar,
    site_inputs,
    transactional,
    warn,
)
from locate.errors import OptionError


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("--at", "at", required=True, metavar="X,Y[,Z]",
              help="Where the reference sound was made, in the site's frame: x,y[,z] in metres "
                   "for a local site, lat,lon[,alt] in degrees (alt: ellipsoidal height, m) for "
                   "a wgs84 site. The height defaults to the mean mic height.")
@click.option("--from", "start_s", type=FINITE, required=True,
              help="Start of a span holding the reference sound at every mic, seconds "
                   "(current clocks).")
@click.option("--to", "stop_s", type=FINITE, required=True, help="End of that span, seconds.")
@click.option("--at2", default=None, metavar="X,Y[,Z]",
              help="A second reference sound (same frame as --at), well apart in time: also "
                   "fits each mic's clock drift.")
@click.option("--from2", "start2_s", type=FINITE, default=None, help="Span of the second sound.")
@click.option("--to2", "stop2_s", type=FINITE, default=None, help="End of that span.")
@click.option("--at-sd", "at_sd_m", type=FINITE, default=0.0, show_default=True,
              help="How well the reference points are known, metres per axis.")
@click.option("--band", default=None, metavar="LO:HI", help="Analysis band in Hz.")
@click.option("-o", "--output", "out_path", required=True, type=click.Path(dir_okay=False),
              help="The new site file to write (never the input).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
              help="Also write the calibration (offsets, drifts, uncertainties) as JSON.")
@click.pass_context
@transactional
def sync(ctx, site_path, at, start_s, stop_s, at2, start2_s, stop2_s, at_sd_m, band, out_path,
         json_path):
    """Per-mic clock offsets (and drifts, given two reference sounds) from a sound made at a
    known point; writes a new site file with offset_s filled in."""
    from locate.common import OutputSet
    from locate.io.audio import open_recordings
    from locate.results.documents import write_atomic, write_json
    from locate.workflows.fixing import conditions_for
    from locate.workflows.sync_site import (
        calibrate,
        parse_point,
        summary_lines,
        sync_report,
        synced_site_text,
    )

    band_hz = parse_band(band)
    check_span_args(start_s, stop_s)
    second = (at2, start2_s, stop2_s)
    if any(v is not None for v in second) and not all(v is not None for v in second):
        raise OptionError("a second reference sound needs all of --at2, --from2 and --to2",
                          field="--at2")
    if at2 is not None:
        check_span_args(start2_s, stop2_s)
    if at_sd_m < 0:
        raise OptionError(f"{at_sd_m:g} m: must be zero or positive", field="--at-sd")
    site = load(site_path)
    if Path(out_path).resolve() == site.path:
        raise OptionError("is the input site file: give a new file name (the input is never "
                          "overwritten)", file=out_path, field="-o")
    check_outputs({"-o": out_path, "--json": json_path}, site_inputs(site))
    points = [parse_point(at, site, option="--at")]
    spans = [(start_s, stop_s)]
    if at2 is not None:
        points.append(parse_point(at2, site, option="--at2"))
        spans.append((start2_s, stop2_s))
    rec = open_recordings(site)
    check_band(band_hz, rec.sample_rate_hz)
    cond = conditions_for(site)
    with progress_bar(ctx, 2 * len(spans), "Measuring the reference sound(s)") as bar:
        fit, reports = calibrate(site, rec, cond, spans, points, band_hz=band_hz,
                                 point_sd_m=at_sd_m, passes=2, progress=bar.update)
    write_atomic(out_path, synced_site_text(site, fit, out_path))
    staged = OutputSet.current().staged(out_path)
    load(staged or out_path)  # the new file must read back (before it is put in place)
    for line in summary_lines(site, fit):
        echo(ctx, line)
    report = sync_report(site, cond, fit, reports)
    for w in dict.fromkeys(report["warnings"] + list(rec.warnings)):
        warn(w)
    if json_path:
        write_json(json_path, report)
        announce(ctx, f"Result written to {json_path}")
    announce(ctx, f"New site file written to {out_path}")
    return report
