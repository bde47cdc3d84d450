"""``tdoa plan``: expected accuracy over the site and the best next mic."""

from __future__ import annotations

import click

from locate.cli.common import (
    FINITE,
    announce,
    check_outputs,
    echo,
    fmt_length,
    load,
    parse_band,
    progress_bar,
    site_inputs,
    transactional,
)
from locate.errors import OptionError


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.option("-o", "--output", "out_path", type=click.Path(dir_okay=False), default=None,
              help="Planning map (PNG, SVG or PDF).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
              help="Write the plan (expected ellipses, proposals) as JSON here.")
@click.option("--timing-sd", "timing_sd_s", type=FINITE, default=None,
              help="Expected arrival-time accuracy per mic, seconds (e.g. 2e-5).")
@click.option("--band", default=None, metavar="LO:HI",
              help="Predict the timing from the source band (with --snr, --duration).")
@click.option("--snr", "snr_db", type=FINITE, default=None, help="In-band SNR, dB.")
@click.option("--duration", "duration_s", type=FINITE, default=None,
              help="Length of the analysed sound, s.")
@click.option("--target", "target_m", type=FINITE, default=None,
              help="The accuracy you need: largest acceptable 95 % semi-major, metres "
                   "(default: the map's longer side, i.e. any fix at all).")
@click.option("--grid-step", "grid_step_m", type=FINITE, default=None,
              help="Spacing of the map's grid, metres (default: 1/200 of its longer side).")
@click.option("--extent", default=None, metavar="X0:X1:Y0:Y1", help="Map area, metres.")
@click.option("--candidates", default="auto", show_default=True,
              type=click.Choice(["auto", "site", "grid", "none"]),
              help="Where a new mic may go.")
@click.option("--region", default="auto", show_default=True,
              type=click.Choice(["auto", "polygon", "receivers", "extent"]),
              help="Where accuracy matters.")
@click.option("--objective", default="worst", show_default=True,
              type=click.Choice(["worst", "mean"]),
              help="What a proposed mic should improve: the worst or the mean ellipse over the "
                   "region.")
@click.option("--propose", "n_propose", type=click.IntRange(0, 10), default=1, show_default=True,
              help="How many new mics to propose (0: map the layout only).")
@click.option("--dims", type=click.IntRange(2, 3), default=2, show_default=True,
              help="Plan for 2-D fixes (height given) or 3-D fixes.")
@click.option("--source-z", "source_z_m", type=FINITE, default=1.0, show_default=True,
              help="Height of the mapped plane: the source height, metres (same datum as the "
                   "mics); the default is the height `fix` assumes when none is given.")
@click.pass_context
@transactional
def plan(ctx, site_path, out_path, json_path, timing_sd_s, band, snr_db, duration_s,
         grid_step_m, extent, candidates, region, objective, n_propose, dims, source_z_m,
         target_m=None):
    """Expected 95 % ellipse size over the site for the mic layout; best next mic(s)."""
    from locate.accuracy.plan_site import DEFAULT_TIMING_SD_S, plan_site
    from locate.results.documents import write_json

    band_hz = parse_band(band)
    site = load(site_path, dims, require_audio=False)
    check_outputs({"--output": out_path, "--json": json_path}, site_inputs(site))
    ext = None
    if extent is not None:
        try:
            ext = tuple(float(v) for v in extent.split(":"))
            assert len(ext) == 4 and ext[0] < ext[1] and ext[2] < ext[3]
        except (ValueError, AssertionError):
            raise OptionError(f"{extent!r} is not X0:X1:Y0:Y1 with X0 < X1 and Y0 < Y1",
                              field="--extent") from None
    if timing_sd_s is None and band_hz is None:
        timing_sd_s = DEFAULT_TIMING_SD_S
        echo(ctx, f"No timing given: assuming {timing_sd_s * 1e6:g} µs per mic (use "
                  "--timing-sd or --band/--snr/--duration).")
    with progress_bar(ctx, 2 if out_path else 1, "Planning") as bar:
        res = plan_site(site, timing_sd_s=timing_sd_s, band_hz=band_hz, snr_db=snr_db,
                        duration_s=duration_s, grid_step_m=grid_step_m, extent_m=ext,
                        candidates=None if candidates == "none" else candidates, region=region,
                        dims=dims, source_z_m=source_z_m, objective=objective,
                        n_propose=n_propose if candidates != "none" else 0,
                        max_semi_major_m=target_m)
        bar.update(1)
        if out_path:
            from locate.draw import figures as plot
            from locate.draw.plan import plan_figure
            plot.save_figure(plan_figure(res, site), out_path)
            bar.update(1)
    doc = res.to_dict()
    echo(ctx, _plan_summary(doc))
    if json_path:
        write_json(json_path, doc)
        announce(ctx, f"Result written to {json_path}")
    if out_path:
        announce(ctx, f"Planning map written to {out_path}")
    return doc


def _plan_summary(doc):
    limit = doc.get("limit_m")
    if doc.get("target_given"):
        head = (f"Locatable to within {fmt_length(limit)} (95 % semi-major): "
                f"{100 * doc.get('locatable_fraction', 0):.0f} % of the map area")
    else:
        head = (f"Locatable at all: {100 * doc.get('locatable_fraction', 0):.0f} % of the map "
                "area (give --target for the accuracy you need)")
    lines = [head]
    for r in doc.get("receivers", []) or []:
        if isinstance(r, dict) and "name" in r:
            val = r.get("semi_major_m")
            lines.append(f"  at {r['name']}: expected 95 % semi-major {fmt_length(val)}")
    def size(v):
        if v is None and doc.get("target_given"):
            return f"above the {fmt_length(limit)} target"
        return fmt_length(v)

    for p in doc.get("proposals", []) or []:
        pos = p["position_m"]
        where = f"at ({pos[0]:.1f}, {pos[1]:.1f}) m"
        label = "" if p["name"].startswith("(") else f"{p['name']} "
        lines.append(f"Proposed next mic {label}{where}: {doc.get('objective', 'worst')} "
                     f"semi-major over the region {size(p['metric_before_m'])} -> "
                     f"{size(p['metric_after_m'])}"
                     + (f" ({p['factor']:.1f}x better)" if p.get("factor") else ""))
    return "\n".join(lines)
