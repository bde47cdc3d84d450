"""Helpers shared by the ``tdoa`` commands: option parsing, screen output, output files.

Nothing here computes: the commands call :mod:`locate.workflows` and the core.
"""

from __future__ import annotations

import functools
import math
import re
import sys
from pathlib import Path

import click

from locate.common import OutputSet, format_length
from locate.errors import OptionError, TdoaError


class FiniteFloat(click.types.FloatParamType):
    """A float option that must be finite: ``nan``, ``inf`` and ``-inf`` are refused."""

    name = "number"

    def convert(self, value, param, ctx):
        v = super().convert(value, param, ctx)
        if not math.isfinite(v):
            self.fail(f"{value!r} is not a finite number", param, ctx)
        return v


FINITE = FiniteFloat()
"""click type of every float option of the command line."""


def transactional(f):
    """Run a command inside one :class:`locate.common.OutputSet`: every file it writes is
    renamed into place together when it returns, none when it fails or is interrupted."""
    @functools.wraps(f)
    def run(*args, **kwargs):
        with OutputSet():
            return f(*args, **kwargs)
    return run


def announce(ctx, text):
    """Say ``text`` ("written to ...") once the command's outputs are in place."""
    outputs = OutputSet.current()
    if outputs is None:
        echo(ctx, text)
    else:
        outputs.after_commit(lambda: echo(ctx, text))


FIGURE_SUFFIXES = (".png", ".svg", ".pdf")
"""What :func:`locate.draw.figures.save_figure` writes."""

FIGURE_OPTIONS = ("--map", "--panels", "--output")
"""Options that name a figure (``-o/--output`` of ``map`` and ``plan``)."""


def check_outputs(outputs, inputs):
    """Before any work: each output's folder exists, no output is an input (after symlinks,
    ``..`` and hard links), no two outputs are the same file, and a figure has a suffix it can
    be written as.  ``outputs``: option -> path."""
    from locate.results.documents import check_output_paths
    for opt, path in outputs.items():
        if path is not None and opt in FIGURE_OPTIONS \
                and Path(path).suffix.lower() not in FIGURE_SUFFIXES:
            raise OptionError(f"cannot write a figure as "
                              f"{Path(path).suffix or 'a file without extension'!r}: use one of "
                              f"{', '.join(FIGURE_SUFFIXES)}", file=str(path), field=opt)
    return check_output_paths(outputs, inputs)


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
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo < 0 or hi <= lo:
        raise OptionError(f"{value!r}: the low edge must be >= 0 and below the high edge",
                          field="--band")
    return lo, hi


def check_band(band, sample_rate_hz):
    if band is not None and band[1] > sample_rate_hz / 2:
        raise OptionError(f"high edge {band[1]:g} Hz is above the Nyquist frequency "
                          f"{sample_rate_hz / 2:g} Hz of the recordings", field="--band")


def printable(text) -> str:
    """``text`` that any terminal encoding can take: a file name that is not valid UTF-8
    (surrogate escapes) is shown with replacement characters instead of failing to print."""
    text = str(text)
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        text = text.encode("utf-8", "surrogateescape").decode("utf-8", "replace")
    return text


def echo(ctx, text="", **kw):
    if not ctx.obj.get("quiet"):
        click.echo(printable(text), **kw)


def warn(message):
    click.echo(printable(f"tdoa: warning: {message}"), err=True)


def check_sketch(site):
    """Read the site's sketch image and GeoJSON now, before any work, when a map is asked
    for: a damaged one is refused before the fix, not after it."""
    if getattr(site, "sketch", None) is None:
        return
    from locate.draw.figures import _wgs84_to_local
    from locate.io.sketch import load_sketch

    to_local = _wgs84_to_local(site) if site.coordinates == "wgs84" else None
    load_sketch(site.sketch, file=site.path, to_local=to_local)


def progress_bar(ctx, length, label):
    """A click progress bar on a terminal; a no-op object in pipes or with --quiet."""
    show = sys.stderr.isatty() and not ctx.obj.get("quiet")
    if show:
        return click.progressbar(length=max(int(length), 1), label=label, file=sys.stderr)
    from locate.workflows.progress import no_progress

    return no_progress(label, length)


def load(site_path, dims=2, require_audio=True):
    from locate.io.site import load_site
    return load_site(site_path, dims=dims, require_audio=require_audio)


class ClockTime(str):
    """An ISO 8601 clock time given for ``--from``/``--to``; seconds once the recordings are
    open (:func:`resolve_span`)."""


class _TimeType(click.ParamType):
    """Seconds into the recording (a number) or an ISO 8601 clock time."""

    name = "SECONDS|ISO8601"

    def convert(self, value, param, ctx):
        if isinstance(value, (float, int)) or isinstance(value, ClockTime):
            return value
        text = str(value).strip()
        try:
            seconds = float(text)
        except ValueError:
            seconds = None
        if seconds is not None:
            if not math.isfinite(seconds):
                self.fail(f"{value!r} is not a finite number of seconds", param, ctx)
            return seconds
        from locate.io.site import parse_start_time

        try:
            parse_start_time(text)
        except ValueError:
            self.fail(f"{value!r} is neither seconds nor an ISO 8601 clock time such as "
                      "2026-11-18T23:58:30Z", param, ctx)
        return ClockTime(text)


TIME = _TimeType()


def resolve_span(rec, start_s, stop_s, window_s=None):
    """``--from``/``--to`` in seconds of the recordings' time base (clock times converted).

    A clock time without a zone is UTC.  Raises OptionError when the recordings carry no clock
    time or the converted span is empty.
    """
    from locate.io.site import parse_start_time

    out = []
    for v, opt in ((start_s, "--from"), (stop_s, "--to")):
        if isinstance(v, ClockTime):
            if getattr(rec, "epoch", None) is None:
                raise OptionError(f"{v} is a clock time but the recordings carry none (no "
                                  "bext stamps, no start_time): give seconds", field=opt)
            out.append(rec.seconds_at(*parse_start_time(v)))
        else:
            out.append(v)
    if any(isinstance(v, ClockTime) for v in (start_s, stop_s)):
        a, b = out
        if b is not None and a is not None and b <= a:
            raise OptionError(f"the span {start_s} .. {stop_s} is empty: --from must be before "
                              "--to", field="--from")
        if a is not None and a < rec.start_s - 1e-9:
            raise OptionError(f"{start_s} is before the recordings begin "
                              f"({rec.clock_time(rec.start_s)})", field="--from")
        check_span_args(max(a, 0.0), b, window_s)
    return out[0], out[1]


def span_options(f):
    """--from, --to and --band, listed in that order (the last applied is listed first)."""
    f = click.option("--band", default=None, metavar="LO:HI",
                     help="Analysis band in Hz (default: where the signal stands above the "
                          "noise).")(f)
    f = click.option("--to", "stop_s", type=TIME, default=None,
                     help="End of the span: seconds, or an ISO 8601 clock time.")(f)
    f = click.option("--from", "start_s", type=TIME, default=None,
                     help="Start of the span: seconds into the recording, or an ISO 8601 "
                          "clock time (UTC unless a zone is given) when they carry one.")(f)
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
        if not math.isfinite(h) or (h.sd is not None
                                    and not (math.isfinite(h.sd) and h.sd >= 0)):
            self.fail(f"{value!r}: the height and its uncertainty must be finite, the "
                      "uncertainty >= 0", param, ctx)
        return h


HEIGHT = _HeightType()


def geometry_options(f):
    f = click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True,
                     help="2: horizontal fix at a given source height; 3: full 3-D fix.")(f)
    f = click.option("--source-z", "source_z_m", type=HEIGHT, default=0.0,
                     help="Source height for 2-D fixes, metres above the ground (same datum as "
                          "the mics), optionally with its uncertainty: 1.0 or 1.0±0.5 (also typed "
                          "1.0+-0.5).  fix: default 1 m ± 0.6 m (a source between the ground "
                          "and 2 m); track: default 0.")(f)
    f = click.option("--sound-speed", "sound_speed_mps", type=FINITE, default=None,
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
    if isinstance(start_s, ClockTime) or isinstance(stop_s, ClockTime):
        return  # checked by resolve_span once the recordings' clock is known
    if start_s is not None and (start_s < 0 or stop_s <= start_s):
        raise OptionError(f"the span {start_s:g}..{stop_s:g} s is empty or negative: --from "
                          "must be >= 0 and before --to", field="--from")
    if window_s is not None and window_s <= 0:
        raise OptionError(f"window {window_s:g} s must be positive", field="--window")


def site_inputs(site):
    """Every file a site brings to a run: the site file, recordings, sketch image, GeoJSON."""
    files = [site.path, site.recording_file] + [m.file for m in site.mics]
    sketch = getattr(site, "sketch", None)
    if sketch is not None:
        files += [getattr(sketch, "image", None), getattr(sketch, "geojson", None)]
    files += [f for m in site.mics for f in (getattr(m, "files", None) or ())]
    return [f for f in files if f is not None]


def write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path, *,
                      compact=False):
    """The files a fix result asked for: JSON (compact for sweeps), CSV, GeoJSON, map."""
    from locate.results.documents import fixes_csv, write_atomic, write_json
    from locate.results.geojson import write_geojson

    if json_path:
        write_json(json_path, result, indent=None if compact else 1)
        announce(ctx, f"Result written to {json_path}")
    if csv_path:
        write_atomic(csv_path, fixes_csv(result))
    if geojson_path:
        write_geojson(geojson_path, result, site.origin_wgs84)
        announce(ctx, f"GeoJSON written to {geojson_path}")
    if map_path:
        draw_map(site, result, map_path)
        announce(ctx, f"Map written to {map_path}")


LONG_RUN = 20
"""From this many fixes on, the printout ends with a summary line, repeated warnings are said
once with a count and the per-fix uncertainty lines stay in the result JSON."""


def print_fixes(ctx, site, cond, result):
    from locate.results.documents import fix_label

    echo(ctx, f"{site.title}: {len(site.mics)} mics, sound speed "
              f"{cond.sound_speed_mps:.2f} m/s ({cond.temperature_c:g} °C, "
              f"{cond.relative_humidity:g} % RH)"
              + (f", wind {cond.wind_speed_mps:g} m/s from {cond.wind_from_deg:g}° (from north)"
                 if cond.wind_speed_mps else ""))
    fixes = result["fixes"]
    long_run = len(fixes) >= LONG_RUN
    said = {}
    for k, f in enumerate(fixes, 1):
        x, y, z = f["position_m"]
        e = f["ellipse95"]
        sd_z = result.get("source_z_sd_m")
        height = (f"z {z:.2f} m (solved)" if f["dims"] == 3 else
                  f"z {z:.2f} m ± {sd_z:.2f} m ({result.get('source_z_basis', 'given')})"
                  if sd_z else f"z {z:.2f} m (given)")
        label = fix_label(f, k)
        span = f.get("span_s")
        if f.get("event") is None and span and float(span[0]) == float(f["t_s"]):
            when = f"span {float(span[0]):.3f}..{float(span[1]):.3f} s"  # not an onset
        else:
            when = f"heard at {f['t_s']:.3f} s"
        when += f" ({f['t_utc']})" if f.get("t_utc") else ""
        echo(ctx, f"#{label} {when}  ->  x {x:.2f} m, y {y:.2f} m, {height}")
        echo(ctx, f"   95 % ellipse {fmt_length(e['semi_major_m'])} × "
                  f"{fmt_length(e['semi_minor_m'])} "
                  f"(half-axes), long axis {e['azimuth_deg']:.0f}° from north; timing residual "
                  f"{f['residual_rms_s'] * 1e6:.1f} µs; mics used {' '.join(f['used_mics'])}"
                  + (f"; rejected {' '.join(f['rejected_mics'])}" if f["rejected_mics"] else ""))
        if f.get("uncertainty_budget") and not long_run:  # long runs: in the JSON only
            from locate.accuracy.budget import budget_summary
            echo(ctx, "   " + budget_summary(f["uncertainty_budget"]))
        for w in f["warnings"]:
            if long_run:
                said.setdefault(w, []).append(label)
            else:
                warn(f"#{label}: {w}")
    for w, labels in said.items():
        if len(labels) == 1:
            warn(f"#{labels[0]}: {w}")
        else:
            shown = ", ".join(f"#{v}" for v in labels[:5]) + (", …" if len(labels) > 5 else "")
            warn(f"{len(labels)} fixes ({shown}): {w}")
    if long_run:
        echo(ctx, run_summary(result))


def run_summary(result) -> str:
    """The closing line of a long run: fixes, spans that gave none, fixes with warnings, and
    the spread of the 95 % semi-majors."""
    import numpy as np

    fixes = result.get("fixes") or []
    warned = sum(1 for f in fixes if f.get("warnings"))
    refused = int(result.get("spans_without_fix") or 0)
    majors = np.array([(f.get("ellipse95") or {}).get("semi_major_m") or np.nan
                       for f in fixes], dtype=float)
    majors = majors[np.isfinite(majors)]
    text = (f"Summary: {len(fixes)} fix(es), {refused} span(s) without a fix, {warned} fix(es) "
            "with a warning")
    if majors.size:
        text += (f"; 95 % semi-major median {fmt_length(float(np.median(majors)))}, largest "
                 f"{fmt_length(float(majors.max()))}")
    return text


fmt_length = format_length  # the package's one length formatter


def draw_map(site, result, path):
    from locate.draw import figures as plot
    fig = plot.map_figure(site, result)
    plot.save_figure(fig, path)


def timeline_option(f):
    return click.option("--timeline", "timeline_path", type=click.Path(dir_okay=False),
                        default=None, help="Draw each recorder's coverage (and the events or "
                        "fixes) against clock time (PNG, SVG or PDF).")(f)


def draw_timeline(ctx, rec, result, path):
    from locate.draw import figures as plot
    from locate.draw.timeline import timeline_figure
    plot.save_figure(timeline_figure(rec, result), path)
    echo(ctx, f"Timeline written to {path}")


def draw_panels(result, path):
    from locate.draw import figures as plot
    fig = plot.panels_figure(result)
    plot.save_figure(fig, path)


def fmt_db(v):
    return "  --" if v is None else f"{v:.1f}"


OPTION_OF = {
    "fix_index": "--fix", "fix_no": "--fix", "events": "--events", "at": "--at",
    "start2_s": "--from2",
    "sound_speed_mps": "--sound-speed", "stop_s": "--to", "scheduler": "--scheduler",
    "extent_m": "--extent", "candidates": "--candidates", "grid_step_m": "--grid-step",
    "region": "--region", "dims": "--dims", "objective": "--objective", "n_propose": "--propose",
    "timing_sd_s": "--timing-sd", "band_hz": "--band", "duration_s": "--duration",
    "start_s": "--from", "window_s": "--window", "hop_s": "--hop", "solve_wind": "--solve-wind",
    "model": "--model", "source_z_m": "--source-z", "speed_guess_mps": "--speed-guess",
    "threshold_db": "--threshold", "segment_s": "--segment", "snr_db": "--snr",
    "source_z_sd_m": "--source-z-sd", "solve_air": "--solve-air",
    "chunk_s": "--chunk", "chunk_overlap_s": "--chunk-overlap",
}
"""The library names its parameters in errors (``window_s``); the command line says the option
the user typed (``--window``)."""

_PARAMETER = re.compile(r"\b(" + "|".join(sorted((k for k in OPTION_OF if "_" in k), key=len,
                                                   reverse=True)) + r")\b")


_OS_ADVICE = {
    "EROFS": "the folder is read-only: write the outputs to another folder",
    "EACCES": "permission denied: write to a folder you may write to, or fix its permissions",
    "EPERM": "not permitted: write to a folder you may write to, or fix its permissions",
    "ENOSPC": "the disk is full: free some space or write the outputs to another disk",
    "EDQUOT": "your disk quota is used up: free some space or write elsewhere",
    "EFBIG": "the file would be larger than allowed here (disk full, file size limit): free "
             "space, raise the limit or write elsewhere",
    "ENAMETOOLONG": "the file name is too long: choose a shorter name",
    "EISDIR": "is a folder, not a file: give a file name",
    "ENOTDIR": "a part of the path is a file, not a folder: check the path",
    "ENOENT": "no such file or folder: check the path",
    "ELOOP": "the symbolic links loop (a link points to itself): fix the link",
    "EEXIST": "already exists",
    "EMFILE": "too many open files: raise the limit (ulimit -n) or run fewer jobs",
    "ENFILE": "too many open files on this system: close some programs and run again",
    "EIO": "input/output error on the disk: copy the files to a healthy disk",
    "EBUSY": "the file is busy: close the program using it",
    "ETXTBSY": "the file is busy: close the program using it",
    "EXDEV": "cannot move a file across disks",
}
"""What to do about an operating-system error, by errno name."""

INTERNAL_ERRNO = {"EMFILE", "ENFILE"}  # the machine, not the input: exit code 1


def os_error_line(exc: OSError) -> tuple[str, int]:
    """One line (``FILE: what happened: what to do``) and the exit code for an OS error."""
    import errno as _errno
    import os as _os
    name = _errno.errorcode.get(exc.errno or 0, "")
    what = exc.strerror or str(exc) or type(exc).__name__
    advice = _OS_ADVICE.get(name)
    files = [f for f in (exc.filename, getattr(exc, "filename2", None)) if f]
    where = " -> ".join(_os.fsdecode(f) for f in files)
    text = f"{what} ({advice})" if advice and advice != what else what
    line = f"{where}: {text}" if where else text
    return " ".join(line.split()), (1 if name in INTERNAL_ERRNO or not advice else 2)


def as_options(exc: TdoaError) -> TdoaError:
    """Say the command-line option where the library named its parameter (field and text)."""
    exc.field = OPTION_OF.get(exc.field, exc.field)
    exc.message = _PARAMETER.sub(lambda m: OPTION_OF[m.group(1)], exc.message)
    return exc
