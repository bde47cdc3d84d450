"""``tdoa check``: validate the site file and recordings."""

from __future__ import annotations

from pathlib import Path

import click

from locate.cli.common import (
    draw_timeline,
    echo,
    load,
    progress_bar,
    site_inputs,
    timeline_option,
    transactional,
    warn,
)

TIMELINE_CHARS = 48  # width of the coverage timeline
CHECK_SCAN_S = 300.0  # tdoa check reads this much of the recordings for channel problems
MIN_DURATION_S = 0.1  # shorter than this holds no analysable sound (delays of a 100 m array
# are up to 0.3 s; a GCC window needs several periods of the lowest band: common practice)
MIN_RATE_HZ = 8000.0  # below this the band above ~4 kHz is lost and timing is coarse
# (one sample = 125 us = 4 cm of sound path at 8 kHz; common practice for TDOA recorders)


def usability_notes(rec, span_m, sound_speed_mps):
    """Warnings for recordings that cannot locate anything: too short, sample rate too low."""
    notes = []
    longest_delay_s = span_m / sound_speed_mps
    need_s = max(MIN_DURATION_S, 2.0 * longest_delay_s)
    if rec.duration_s < need_s:
        notes.append(f"the recordings share only {rec.duration_s:.4g} s: too short to locate "
                     f"anything (need at least {need_s:.2g} s: a sound plus the largest delay "
                     f"of this array, {longest_delay_s * 1e3:.0f} ms, on both sides)")
    if rec.sample_rate_hz < MIN_RATE_HZ:
        notes.append(f"sample rate {rec.sample_rate_hz:g} Hz is too low to time sounds (one "
                     f"sample = {1e3 / rec.sample_rate_hz:.3g} ms = "
                     f"{sound_speed_mps / rec.sample_rate_hz:.3g} m of sound path; record at "
                     f"{MIN_RATE_HZ / 1e3:g} kHz or more, 48 kHz is usual)")
    return notes


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True,
              help="Check the layout for 2-D fixes (3+ mics) or 3-D fixes (4+ mics at several "
                   "heights).")
@timeline_option
@click.pass_context
@transactional
def check(ctx, site_path, dims, timeline_path=None):
    """Validate the site file and recordings; print geometry and warnings."""
    from locate.io.audio import open_recordings
    from locate.workflows.conditions import conditions_for

    site = load(site_path, dims)
    if timeline_path:
        from locate.results.documents import check_output_path
        check_output_path(timeline_path, site_inputs(site), option="--timeline")
    rec = open_recordings(site)
    cond = conditions_for(site)
    pos = site.positions_m
    import numpy as np

    span = np.max(np.linalg.norm(pos[:, None, :2] - pos[None, :, :2], axis=-1))
    echo(ctx, f"Site      {site.title}  ({site.path.name}, coordinates {site.coordinates})")
    echo(ctx, f"Air       {cond.temperature_c:g} degC, {cond.relative_humidity:g} % RH, "
              f"sound speed {cond.sound_speed_mps:.2f} m/s; wind {cond.wind_speed_mps:g} m/s "
              f"from {cond.wind_from_deg:g} deg")
    echo(ctx, f"Audio     {rec.sample_rate_hz:g} Hz, {rec.duration_s:.2f} s "
              + ("common to all mics" if rec.deployment is None else
                 "from the first recorder's start to the last one's end"))
    echo(ctx, f"Array     {len(pos)} mics, widest spacing {span:.1f} m "
              f"(largest delay {span / cond.sound_speed_mps * 1e3:.1f} ms)")
    for (name, path, ch), m in zip(rec.files, site.mics):
        x, y, z = m.position_m
        many = f" (+{len(m.files) - 1} more)" if m.files and len(m.files) > 1 else ""
        echo(ctx, f"  {name:<8} x {x:9.2f}  y {y:9.2f}  z {z:6.2f} m   {Path(path).name}{many} "
                  f"ch {ch}  offset {m.offset_s:+.6f} s")
    if rec.deployment is not None:
        print_coverage(ctx, rec)
    opened = list(rec.warnings)
    stop_s = min(rec.stop_s, rec.start_s + CHECK_SCAN_S)  # dead, silent or clipped channels
    with progress_bar(ctx, stop_s - rec.start_s, "Reading the recordings") as bar:
        for _t0, signals, _ in rec.blocks(60.0, 0.0, rec.start_s, stop_s, reuse=True,
                                          gaps_ok=True):
            bar.update(signals.shape[1] / rec.sample_rate_hz)
    found = [w for w in rec.warnings if w not in opened]
    unusable = usability_notes(rec, float(span), cond.sound_speed_mps)
    scanned = (f"the first {stop_s - rec.start_s:.0f} s" if stop_s < rec.stop_s
               else "all of it")
    echo(ctx, f"Signals   read {scanned}: "
              + (f"{len(found)} channel problem(s), see the warnings" if found else
                 "no dead, silent or clipped channel"))
    for w in list(site.warnings) + list(rec.warnings) + unusable:
        warn(w)
    if timeline_path:
        draw_timeline(ctx, rec, None, timeline_path)
    if unusable:
        echo(ctx, "Site file and recordings are readable, but these recordings cannot locate "
                  "a sound (see the warnings).")
    elif found:
        echo(ctx, "Site file and recordings are readable; mind the channel warnings before a "
                  "fix.")
    elif opened:
        echo(ctx, "Site file and recordings are readable; mind the warnings before a fix.")
    else:
        echo(ctx, "Site file and recordings look usable.")


def _clock(rec, t):
    text = rec.clock_time(t)
    return f"{t:.3f} s" if text is None else f"{text} ({t:.3f} s)"


def print_coverage(ctx, rec):
    """Each recorder's coverage: start, end, gaps, sample rate, timestamp source, timeline."""
    import numpy as np

    from locate.io.deployment import coverage_rows

    rows = coverage_rows(rec)
    t0, t1 = rec.start_s, rec.stop_s
    head = (f"Coverage  {t1 - t0:.1f} s from {_clock(rec, t0)}"
            if rec.epoch is not None else f"Coverage  {t1 - t0:.1f} s (no clock time)")
    echo(ctx, head)
    width = TIMELINE_CHARS
    for r in rows:
        line = [" "] * width
        edges = np.linspace(t0, t1, width + 1)
        for k in range(width):
            a, b = edges[k], edges[k + 1]
            inside = r["start_s"] < b and r["stop_s"] > a
            hole = any(lo <= a and hi >= b for lo, hi in r["gaps"])
            partly = any(lo < b and hi > a for lo, hi in r["gaps"])
            line[k] = " " if not inside or hole else (":" if partly else "#")
        gaps = ("no gaps" if not r["gaps"] else
                f"{len(r['gaps'])} gap(s): " + "; ".join(
                    f"{_clock(rec, a)} to {_clock(rec, b)} ({b - a:.1f} s)"
                    for a, b in r["gaps"]))
        echo(ctx, f"  {r['mic']:<8} |{''.join(line)}| {r['files']} file(s), "
                  f"{r['sample_rate_hz']} Hz, times from {r['source']}")
        echo(ctx, f"  {'':<8} {_clock(rec, r['start_s'])} to {_clock(rec, r['stop_s'])}; "
                  f"{gaps}")
