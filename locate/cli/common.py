"""Helpers shared by the ``tdoa`` commands: option parsing, screen output, output files.

Nothing here computes: the commands call :mod:`locate.workflows` and the core.
"""

from __future__ import annotations

import re
import sys

import click
import numpy as np

from locate.common import format_length
from locate.errors import OptionError


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
    from locate.io.site import load_site
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


class Height(float):
    """A source height (float, metres) with its standard deviation ``sd`` (None: not given)."""

    sd = None


class _HeightType(click.ParamType):
    """``Z`` or ``Z+-SD`` (also ``Z±SD``), metres."""

    name = "Z[+-SD]"

    def convert(self, value, param, ctx):
        if isinstance(value, float | int):
            return value
        text = str(value).strip().replace("±", "+-")
        z_text, _, sd_text = text.partition("+-")
        try:
            h = Height(float(z_text))
            if sd_text:
                h.sd = float(sd_text)
        except ValueError:
            self.fail(f"{value!r} is not a height: give metres, e.g. 1.0 or 1.0+-0.5", param,
                      ctx)
        if not np.isfinite(h) or (h.sd is not None and not (np.isfinite(h.sd) and h.sd >= 0)):
            self.fail(f"{value!r}: the height and its uncertainty must be finite, the "
                      "uncertainty >= 0", param, ctx)
        return h


HEIGHT = _HeightType()


def geometry_options(f):
    f = click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True,
                     help="2: horizontal fix at a given source height; 3: full 3-D fix.")(f)
    f = click.option("--source-z", "source_z_m", type=HEIGHT, default=0.0,
                     help="Source height for 2-D fixes, metres above the ground (same datum as "
                          "the mics), optionally with its uncertainty: 1.0 or 1.0+-0.5.  fix: "
                          "default 1 m +- 0.6 m (a source between the ground and 2 m); "
                          "track: default 0.")(f)
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


def check_span_args(start_s, stop_s, window_s=None):
    if (start_s is None) != (stop_s is None):
        raise OptionError("give both --from and --to (or neither, to detect events)",
                          field="--from" if start_s is None else "--to")
    if start_s is not None and (start_s < 0 or stop_s <= start_s):
        raise OptionError(f"the span {start_s:g}..{stop_s:g} s is empty or negative: --from "
                          "must be >= 0 and before --to", field="--from")
    if window_s is not None and window_s <= 0:
        raise OptionError(f"window {window_s:g} s must be positive", field="--window")


def site_inputs(site):
    files = [site.path, site.recording_file] + [m.file for m in site.mics]
    return [f for f in files if f is not None]


def write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path, *,
                      compact=False):
    """The files a fix result asked for: JSON (compact for sweeps), CSV, GeoJSON, map."""
    from locate.results.documents import fixes_csv, write_atomic, write_json
    from locate.results.geojson import write_geojson

    if json_path:
        write_json(json_path, result, indent=None if compact else 1)
        echo(ctx, f"Result written to {json_path}")
    if csv_path:
        write_atomic(csv_path, fixes_csv(result))
    if geojson_path:
        write_geojson(geojson_path, result, site.origin_wgs84)
        echo(ctx, f"GeoJSON written to {geojson_path}")
    if map_path:
        draw_map(site, result, map_path)
        echo(ctx, f"Map written to {map_path}")


def print_fixes(ctx, site, cond, result):
    echo(ctx, f"{site.title}: {len(site.mics)} mics, sound speed "
              f"{cond.sound_speed_mps:.2f} m/s ({cond.temperature_c:g} degC, "
              f"{cond.relative_humidity:g} % RH)"
              + (f", wind {cond.wind_speed_mps:g} m/s from {cond.wind_from_deg:g} deg"
                 if cond.wind_speed_mps else ""))
    for k, f in enumerate(result["fixes"], 1):
        x, y, z = f["position_m"]
        e = f["ellipse95"]
        sd_z = result.get("source_z_sd_m")
        height = (f"z {z:.2f} m (solved)" if f["dims"] == 3 else
                  f"z {z:.2f} m +- {sd_z:.2f} m ({result.get('source_z_basis', 'given')})"
                  if sd_z else f"z {z:.2f} m (given)")
        echo(ctx, f"#{k} heard at {f['t_s']:.3f} s  ->  x {x:.2f} m, y {y:.2f} m, {height}")
        echo(ctx, f"   95 % ellipse {fmt_length(e['semi_major_m'])} x "
                  f"{fmt_length(e['semi_minor_m'])} "
                  f"(half-axes), long axis toward {e['azimuth_deg']:.0f} deg; timing residual "
                  f"{f['residual_rms_s'] * 1e6:.1f} us; mics used {' '.join(f['used_mics'])}"
                  + (f"; rejected {' '.join(f['rejected_mics'])}" if f["rejected_mics"] else ""))
        if f.get("uncertainty_budget"):
            from locate.accuracy.budget import budget_summary
            echo(ctx, "   " + budget_summary(f["uncertainty_budget"]))
        for w in f["warnings"]:
            warn(f"#{k}: {w}")


def same_shape(message):
    """A warning with its numbers blanked: the same note about other figures compares equal."""
    return re.sub(r"[-+]?\d+(\.\d+)?", "#", message)




fmt_length = format_length  # the package's one length formatter


def draw_map(site, result, path):
    from locate.draw import figures as plot
    fig = plot.map_figure(site, result)
    plot.save_figure(fig, path)


def draw_panels(result, path):
    from locate.draw import figures as plot
    fig = plot.panels_figure(result)
    plot.save_figure(fig, path)


def fmt_db(v):
    return "  --" if v is None else f"{v:.1f}"


def check_same_site(site, result, result_path):
    from locate.errors import ResultFileError
    names = [m.get("name") for m in result.get("mics", [])]
    if names and names != site.mic_names:
        raise ResultFileError(f"its mics ({', '.join(map(str, names))}) are not this site's "
                              f"({', '.join(site.mic_names)}): was it made from another site "
                              "file?", file=result_path, field="mics")
    from locate.results.documents import check_mic_positions
    check_mic_positions(site, result, result_path)
