"""``tdoa fix --window W --sweep``: option checks and the run.

The windows are those of ``fix --window`` (:func:`locate.workflows.windows.window_fixes`,
each with its delays, checks and budget); ``--sweep`` only chooses the output: a summary on
screen, compact JSON, and ``--hop`` for overlapping windows."""

from __future__ import annotations

from locate.cli.common import echo, fmt_length, progress_bar, warn, write_fix_outputs
from locate.errors import NothingFoundError, OptionError

__all__ = ["check_sweep_args", "run_sweep"]


def check_sweep_args(window_s, hop_s, sweep, start_s, solve_air, panels_path):
    if hop_s is not None and not sweep:
        raise OptionError("--hop works with --window --sweep only", field="--hop")
    if not sweep:
        return
    if window_s is None or start_s is None:
        raise OptionError("--sweep needs --window and a span (--from/--to)", field="--sweep")
    if hop_s is not None and not 0 < hop_s <= window_s:
        raise OptionError(f"hop {hop_s:g} s must be positive and at most the window "
                          f"({window_s:g} s)", field="--hop")
    if solve_air or panels_path:
        raise OptionError("--sweep does not combine with "
                          + ("--solve-air" if solve_air else "--panels")
                          + ": use --window without --sweep", field="--sweep")


def run_sweep(ctx, rec, site, cond, start_s, stop_s, window_s, hop_s, band_hz, dims, source_z_m,
              reject, warnings, json_path, csv_path, geojson_path, map_path, source_z_sd_m=0.0):
    """``fix --window W --sweep``: the windows of ``fix --window``, a summary on screen and
    compact JSON."""
    from locate.workflows.fixing import add_clock_times, fix_result
    from locate.workflows.sweep import sweep_summary_lines, sweep_verdict
    from locate.workflows.windows import window_fixes

    hop_s = window_s if hop_s is None else hop_s
    n_windows = int((stop_s - start_s - window_s) // hop_s) + 1
    with progress_bar(ctx, n_windows, "Locating windows") as bar:
        entries, notes = window_fixes(rec, site, cond, start_s, stop_s, window_s, hop_s,
                                      band_hz=band_hz, dims=dims, source_z_m=source_z_m,
                                      source_z_sd_m=source_z_sd_m, reject=reject,
                                      progress=bar.update)
    warnings = warnings + notes + [w for w in rec.warnings if w not in warnings]
    if not entries:
        for w in warnings:
            warn(w)
        raise NothingFoundError("no window gave a usable fix (see the warnings above)")
    verdict = sweep_verdict(entries)
    result = fix_result(site, cond, entries, warnings=verdict + warnings,
                        dims=dims, source_z_m=source_z_m)
    add_clock_times(result, rec, site)
    lines, window_warnings = sweep_summary_lines(entries, window_s, hop_s, length=fmt_length)
    for line in lines:
        echo(ctx, line)
    for w in window_warnings + [w for w in result["warnings"] if w not in verdict]:
        warn(w)
    write_fix_outputs(ctx, site, result, json_path, csv_path, geojson_path, map_path,
                      compact=True)  # thousands of windows: compact JSON
    return result
