"""``tdoa level``: source sound power per band and levels at receivers."""

from __future__ import annotations

import click

from locate.cli.common import (
    announce,
    check_outputs,
    echo,
    fmt_db,
    load,
    site_inputs,
    transactional,
    warn,
)
from locate.errors import OptionError


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.argument("result_path", metavar="RESULT", type=click.Path())
@click.option("--fix", "fix_no", type=int, default=None,
              help="Only this fix of the result (1-based; default: every fix).")
@click.option("--hemisphere", is_flag=True,
              help="Source on hard ground radiating into a half space (8 dB, not 11 dB).")
@click.option("--ground", "ground", type=click.FloatRange(0.0, 1.0), default=None,
              help="Ground factor G for the receivers, ISO 9613-2 general method (0 hard, e.g. "
                   "paving or water; 1 porous, e.g. grass or crops). Default: no ground "
                   "effect (free field).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None,
              help="Write the levels (source power, receiver levels) as JSON here.")
@click.pass_context
@transactional
def level(ctx, site_path, result_path, fix_no, hemisphere, ground, json_path):
    """Source sound power per octave band, and the level at the site's named receivers.

    RESULT is a fix result (a sound from a still source: LAeq, LAE, LAFmax and LCpeak at the
    mics and receivers) or a track result (a pass-by: LAFmax with its time and LAE at the
    receivers, from the reconstructed path and the source's sound power).
    """
    from locate.io.audio import open_recordings
    from locate.results.documents import check_same_site, read_result, write_json
    from locate.workflows.level import levels_of_result

    site = load(site_path)
    check_outputs({"--json": json_path}, site_inputs(site) + [result_path])
    result = read_result(result_path, kinds=("fix", "track"))
    check_same_site(site, result, result_path)
    if result.get("kind") == "track" and fix_no is not None:
        raise OptionError("--fix applies to a fix result; RESULT is a track", field="--fix")
    doc = levels_of_result(site, open_recordings(site), result, result_path=result_path,
                           fix_no=fix_no, hemisphere=hemisphere, ground=ground)
    out = doc["levels"]
    fixes = result.get("fixes", [])
    for lev in out:
        if result.get("kind") == "track":
            _echo_level(ctx, lev, "pass-by")
        else:
            pos = fixes[lev["fix"] - 1]["position_m"]
            _echo_level(ctx, lev, f"#{lev['fix']} at ({pos[0]:.1f}, {pos[1]:.1f}) m")
    echo(ctx, "Screening estimate only (" + ("ISO 9613-2 ground effect, " if ground is not None
                                             else "no ground effect, ")
         + "no meteorology or reflections); not a compliance measurement.")
    if json_path:
        write_json(json_path, doc)
        announce(ctx, f"Result written to {json_path}")
    return out


def _bound(v, up):
    if v is not None:
        return fmt_db(v)
    if up is not None:
        return "<" + f"{up:.0f}"
    return fmt_db(None)


def _echo_level(ctx, lev, head):
    unit = "dB" if lev["calibrated"] else "dBFS-rel"
    ups = lev.get("source_lw_upper_db") or [None] * len(lev["bands_hz"])
    sd = lev.get("lw_position_sd_db")
    sd_text = f" (± {sd:.1f} dB from the position)" if sd is not None else ""
    echo(ctx, f"{head}: sound power LwA {fmt_db(lev['source_lwa_db'])} {unit}{sd_text}, "
              f"averaged over the {lev['active_duration_s']:.3g} s it sounds")
    echo(ctx, f"   {lev.get('source_lwa_note', '')}")
    echo(ctx, "   band Hz   " + " ".join(f"{b:>6}" for b in lev["bands_hz"]))
    echo(ctx, "   Lw        " + " ".join(f"{_bound(v, u):>6}"
                                         for v, u in zip(lev["source_lw_db"], ups)))
    echo(ctx, "   ±mics     " + " ".join(f"{fmt_db(v):>6}" for v in lev["mic_spread_db"]))
    echo(ctx, "   (±mics: how far the mics' own estimates of Lw spread, dB)")
    if any(u is not None for u in ups):
        echo(ctx, "   (<N: the source's part is below N dB; the band is not clearly above the "
                  "noise)")
    for m in lev.get("mics") or []:
        if "lae_db" in m:
            echo(ctx, f"   mic {m['name']}: LAE {fmt_db(m.get('lae_db'))} {unit}, LAFmax "
                      f"{fmt_db(m.get('lafmax_db'))} {unit}, LCpeak {fmt_db(m.get('lcpeak_db'))}"
                      f" {unit}, LAeq,{m.get('interval_s', 0):.3g}s "
                      f"{fmt_db(m.get('laeq_db'))} {unit}")
    for r in lev["receivers"]:
        screen = max((v for v in r.get("screen_db") or r["barrier_db"] if v is not None),
                     default=0.0)
        wall = (f", screening by walls: up to {screen:.1f} dB" if screen > 0.05
                else ", no wall in the way")
        if "t_lafmax_s" in r:
            echo(ctx, f"   at {r['name']} (closest {r['distance_m']:.0f} m): LAFmax "
                      f"{fmt_db(r.get('lafmax_db'))} {unit} at {r['t_lafmax_s']:.2f} s, LAE "
                      f"{fmt_db(r.get('lae_db'))} {unit}{wall}")
        else:
            echo(ctx, f"   at {r['name']} ({r['distance_m']:.0f} m): LAeq,"
                      f"{r.get('laeq_interval_s') or 0:.3g}s {fmt_db(r.get('laeq_db'))} {unit}, "
                      f"LAE {fmt_db(r.get('lae_db'))} {unit}, LAFmax "
                      f"{fmt_db(r.get('lafmax_db'))} {unit}, LCpeak "
                      f"{fmt_db(r.get('lcpeak_db'))} {unit}{wall}")
    for note in lev.get("notes", []):
        warn(f"{head.split(' ')[0]}: {note}")
