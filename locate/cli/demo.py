"""``tdoa demo``: the whole job on the bundled demo recordings (invented scenes).

The recordings are regenerated from the simulator by ``demo_recordings/regenerate.py``.
The steps are listed here, in order; each invokes a command as a user would type it.
"""

from __future__ import annotations

from pathlib import Path

import click

from locate.cli.fix import fix
from locate.cli.level import level
from locate.cli.maps import track
from locate.cli.plan import plan
from locate.cli.report import report
from locate.errors import OptionError
from locate.workflows.demo_data import demo_dir as find_demo_dir

__all__ = ["demo", "find_demo_dir", "run_demo"]


def _yard(ctx, demo_dir, out_dir):
    yard = demo_dir / "yard.toml"
    click.echo(f"== Brackwater Lane depot: night-time bangs ({yard.name})")
    ctx.invoke(fix, site_path=str(yard), start_s=None, stop_s=None, band=None, dims=2,
               source_z_m=1.0, sound_speed_mps=None, json_path=str(out_dir / "yard-fix.json"),
               csv_path=str(out_dir / "yard-fix.csv"), map_path=str(out_dir / "yard-map.png"),
               window_s=None, threshold_db=10.0, panels_path=str(out_dir / "yard-panels.png"),
               no_reject=False)
    click.echo("== How loud were the bangs, and what reached No. 14?")
    ctx.invoke(level, site_path=str(yard), result_path=str(out_dir / "yard-fix.json"),
               fix_no=None, hemisphere=False, json_path=str(out_dir / "yard-level.json"))
    click.echo("== Where should the recorders stand next time?")
    ctx.invoke(plan, site_path=str(yard), out_path=str(out_dir / "yard-plan.png"),
               json_path=str(out_dir / "yard-plan.json"), timing_sd_s=2e-5, band=None,
               snr_db=None, duration_s=None, grid_step_m=None, extent=None,
               candidates="auto", region="auto", objective="worst", n_propose=1, dims=2,
               source_z_m=1.0)


def _lane(ctx, demo_dir, out_dir):
    lane = demo_dir / "lane.toml"
    click.echo(f"== Ostry Road: a passing van ({lane.name})")
    ctx.invoke(track, site_path=str(lane), start_s=1.0, stop_s=7.5, window_s=None, hop_s=None,
               band=None, dims=2, source_z_m=0.8, sound_speed_mps=None, model="straight",
               segment_s=None, speed_guess_mps=20.0, tone=None,
               json_path=str(out_dir / "lane-track.json"),
               map_path=str(out_dir / "lane-map.png"))


def _reports(ctx, demo_dir, out_dir):
    """``report.html`` for the depot (fix + level results) and ``lane-report.html`` for the
    passing van, when their results are there."""
    jobs = [("yard.toml", ("yard-fix.json", "yard-level.json"), "report.html"),
            ("lane.toml", ("lane-track.json",), "lane-report.html")]
    for site_name, names, out_name in jobs:
        present = [str(out_dir / n) for n in names if (out_dir / n).is_file()]
        if not present or not (demo_dir / site_name).is_file():
            continue
        ctx.invoke(report, site_path=str(demo_dir / site_name), result_paths=present,
                   out_path=str(out_dir / out_name), title=None)


STEPS = (("depot", _yard), ("lane", _lane), ("reports", _reports))
"""The demo's steps, in order: (name, callable(ctx, demo_dir, out_dir))."""


def run_demo(ctx, out_dir: Path):
    """Run every step of :data:`STEPS` on the demo scenes, writing into ``out_dir``."""
    demo_dir = find_demo_dir()
    out_dir = Path(out_dir)
    if out_dir.resolve() == demo_dir.resolve():
        raise OptionError("write the demo results to another folder than demo_recordings/",
                          field="DIR")
    out_dir.mkdir(parents=True, exist_ok=True)
    for _name, step in STEPS:
        step(ctx, demo_dir, out_dir)
    click.echo(f"Demo results are in {out_dir}/")


@click.command()
@click.argument("out_dir", metavar="DIR", type=click.Path(file_okay=False), default="tdoa-demo")
@click.pass_context
def demo(ctx, out_dir):
    """Run the whole job on the bundled demo recordings and write results + maps to DIR."""
    run_demo(ctx, Path(out_dir))
