"""``tdoa level``: source sound power per band and levels at receivers."""

from __future__ import annotations

import click

from locate.cli.common import (
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
@click.option("--json", "json_path", type=click.Path(dir_okay=False), default=None)
@click.pass_context
@transactional
def level(ctx, site_path, result_path, fix_no, hemisphere, json_path):
    """Source sound power per octave band, and the level at the site's named receivers."""
    from locate.io.audio import open_recordings
    from locate.results.documents import (
        check_same_site,
        read_result,
        reading_result,
        write_json,
    )
    from locate.workflows.fixing import conditions_for, fix_result
    from locate.workflows.level import level_for_fix

    site = load(site_path)
    check_outputs({"--json": json_path}, site_inputs(site) + [result_path])
    result = read_result(result_path, kinds=("fix",))
    check_same_site(site, result, result_path)
    fixes = result.get("fixes", [])
    if fix_no is not None:
        if not 1 <= fix_no <= len(fixes):
            raise OptionError(f"the result holds {len(fixes)} fix(es); --fix {fix_no} is not "
                              "one of them", field="--fix")
        chosen = [(fix_no, fixes[fix_no - 1])]
    else:
        chosen = list(enumerate(fixes, 1))
    rec = open_recordings(site)
    cond = conditions_for(site, result.get("sound_speed_mps"))
    out = []
    for k, entry in chosen:
        with reading_result(result_path):
            lev = level_for_fix(rec, site, cond, entry, hemisphere=hemisphere,
                                result_path=result_path)
        lev["fix"] = k
        out.append(lev)
        unit = "dB" if lev["calibrated"] else "dBFS-rel"
        echo(ctx, f"#{k} at ({entry['position_m'][0]:.1f}, {entry['position_m'][1]:.1f}) m: "
                  f"sound power {fmt_db(lev['source_lwa_db'])} {unit}(A) "
                  f"(+-{lev['lw_position_sd_db']:.1f} dB from the position), averaged over "
                  f"the {lev['active_duration_s']:.3g} s it sounds")
        echo(ctx, "   band Hz   " + " ".join(f"{b:>6}" for b in lev["bands_hz"]))
        echo(ctx, "   Lw        " + " ".join(f"{fmt_db(v):>6}" for v in lev["source_lw_db"]))
        echo(ctx, "   mic spread" + " ".join(f"{fmt_db(v):>6}" for v in lev["mic_spread_db"]))
        for r in lev["receivers"]:
            screen = max((v for v in r["barrier_db"] if v is not None), default=0.0)
            echo(ctx, f"   at {r['name']} ({r['distance_m']:.0f} m): {fmt_db(r['lpa_db'])} "
                      f"{unit}(A), barrier up to {fmt_db(screen)} dB")
        for note in lev.get("notes", []):
            warn(f"#{k}: {note}")
    echo(ctx, "Screening estimate only: ground effect, meteorology and reflections are not "
              "modelled; not a compliance measurement.")
    if json_path:
        doc = fix_result(site, cond, [], kind="level", warnings=rec.warnings,
                         extra={"levels": out})
        if len(out) == 1:
            doc.update({k: v for k, v in out[0].items() if k != "kind"})
        doc["cautions"] = out[0]["cautions"] if out else doc["cautions"]
        write_json(json_path, doc)
    return out
