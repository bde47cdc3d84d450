"""Command-line options for field surveys shared by ``tdoa fix`` (and reusable by ``track``):
``--geojson``, ``--solve-air``, ``--solve-wind`` and ``--events``.

Kept apart from the command modules so the commands stay short: :func:`field_options` adds the
options, :func:`field_checks` validates them against the site before any computation.
"""

from __future__ import annotations

import click

from locate.errors import OptionError

__all__ = ["field_options", "geojson_option", "field_checks"]


def geojson_option(f):
    """``--geojson PATH``: RFC 7946 GeoJSON of the result (WGS84 sites only)."""
    return click.option(
        "--geojson", "geojson_path", type=click.Path(dir_okay=False), default=None,
        help="Also write fixes (points), their 95 % ellipses (polygons) and the mics as "
             "GeoJSON for GIS programs (sites with coordinates = \"wgs84\").")(f)


def field_options(f):
    """``--geojson``, ``--solve-air``, ``--solve-wind`` and ``--events`` for ``tdoa fix``."""
    f = click.option(
        "--events", "events_choice", default=None, metavar="all|N|T1,T2,...",
        help="Which detected events to fix: all (default), the N-th, or the event nearest "
             "each time T (seconds; a single time needs a decimal point, e.g. 12.0).")(f)
    f = click.option(
        "--solve-wind", "solve_wind", is_flag=True,
        help="With --solve-air, also solve a uniform horizontal wind (needs dims + 4 mics: "
             "6 for 2-D, 7 for 3-D).")(f)
    f = click.option(
        "--solve-air", "solve_air", is_flag=True,
        help="Also solve the effective sound speed from the delays (needs dims + 2 mics: 4 "
             "for 2-D, 5 for 3-D) and compare it with the site's air.")(f)
    f = geojson_option(f)
    return f


def field_checks(site, inputs, *, geojson_path=None, solve_air=False, solve_wind=False,
                 events_choice=None, start_s=None, dims=2):
    """Validate the field options before any computation.

    Returns
    -------
    choice : locate.signal.event_choice.EventChoice or None
    solve_air : bool
        True with ``--solve-air`` or ``--solve-wind``.

    Raises
    ------
    OptionError
        GeoJSON for a local site or into a missing folder; too few mics for the joint fit;
        ``--events`` together with ``--from/--to``.
    """
    from locate.fix.air_solve import require_mics
    from locate.results.geojson import check_geojson_output
    from locate.signal.event_choice import parse_event_choice

    check_geojson_output(geojson_path, site, inputs)
    choice = parse_event_choice(events_choice)
    if choice is not None and start_s is not None:
        raise OptionError("--events chooses among detected events: leave out --from/--to "
                          "(or leave out --events to fix the span)", field="--events")
    solve_air = bool(solve_air or solve_wind)
    if solve_air:
        require_mics(len(site.mics), dims, solve_wind)
    return choice, solve_air
