"""``tdoa fix --from A --to B --sources N|auto``: several sources in one span (see
:mod:`locate.workflows.sources`), and the figure of where the sound comes from."""

from __future__ import annotations

import click

from locate.cli.common import echo, print_fixes, warn, write_fix_outputs
from locate.errors import OptionError

__all__ = ["sources_options", "check_sources_args", "run_sources"]


def sources_options(f):
    f = click.option("--sources", "sources", default="1", show_default=True, metavar="N|auto",
                     help="With --from/--to: fix this many sources of the span, or every one "
                          "that stands out (auto), each with its band.")(f)
    f = click.option("--sources-map", "sources_map_path", type=click.Path(dir_okay=False),
                     default=None,
                     help="With --sources: draw where the sound comes from, band by band, "
                          "over the site (PNG, SVG or PDF).")(f)
    return f


def check_sources_args(sources, sources_map_path, start_s, window_s, sweep, solve_air,
                       panels_path, dims):
    """The parsed ``--sources`` (1 keeps the ordinary fix)."""
    from locate.workflows.sources import parse_sources

    try:
        n = parse_sources(sources)
    except OptionError as exc:
        exc.field = "--sources"
        raise
    if n == 1 and sources_map_path is None:
        return 1
    if start_s is None or window_s is not None or sweep:
        raise OptionError("--sources and --sources-map need one span (--from/--to) without "
                          "--window", field="--sources")
    if solve_air or panels_path:
        raise OptionError("--sources does not combine with "
                          + ("--solve-air" if solve_air else "--panels"), field="--sources")
    if dims != 2:
        raise OptionError("several sources are fixed in 2-D: use --dims 2 with --source-z",
                          field="--sources")
    return n


def run_sources(ctx, site, rec, cond, start_s, stop_s, sources, band_hz, source_z_m,
                sound_speed_mps, reject, json_path, csv_path, geojson_path, map_path,
                sources_map_path):
    from locate.workflows.sources import locate_sources

    result, maps = locate_sources(site, rec, start_s, stop_s, sources=sources, band_hz=band_hz,
                                  source_z_m=source_z_m, sound_speed_mps=sound_speed_mps,
                                  reject=reject)
    print_fixes(ctx, site, cond, result)
    for f in result["fixes"]:
        lo, hi = f["band_hz"]
        echo(ctx, f"   source {f['source'] + 1}: {lo:.0f}-{hi:.0f} Hz "
                  f"({', '.join(f['bands'])})")
    for w in result["warnings"]:
        warn(w)
    write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path)
    if sources_map_path:
        from locate.draw.figures import save_figure
        from locate.draw.sources import sources_figure

        save_figure(sources_figure(site, result, maps), sources_map_path)
        echo(ctx, f"Map of the sources written to {sources_map_path}")
    return result
