"""``tdoa demo``: the whole job on the bundled demo recordings (invented scenes).

The recordings are regenerated from the simulator by ``demo_recordings/regenerate.py``.
"""

from __future__ import annotations

from pathlib import Path

import click

from locate.errors import OptionError

__all__ = ["find_demo_dir", "run_demo"]


def find_demo_dir() -> Path:
    """The ``demo_recordings`` folder: beside the package source, or in the working folder."""
    for base in (Path(__file__).resolve().parent.parent, Path.cwd()):
        d = base / "demo_recordings"
        if (d / "yard.toml").is_file():
            return d
    raise OptionError("demo_recordings/ not found: run tdoa demo from the project checkout",
                      field="demo_recordings")


def run_demo(ctx, out_dir: Path):
    """Run fix (and, where available, track, level, plan, map) on the demo scenes."""
    from locate import cli

    demo_dir = find_demo_dir()
    out_dir = Path(out_dir)
    if out_dir.resolve() == demo_dir.resolve():
        raise OptionError("write the demo results to another folder than demo_recordings/",
                          field="DIR")
    out_dir.mkdir(parents=True, exist_ok=True)
    yard = demo_dir / "yard.toml"
    click.echo(f"== Brackwater Lane depot: night-time bangs ({yard.name})")
    ctx.invoke(cli.fix, site_path=str(yard), start_s=None, stop_s=None, band=None, dims=2,
               source_z_m=1.0, sound_speed_mps=None, json_path=str(out_dir / "yard-fix.json"),
               csv_path=str(out_dir / "yard-fix.csv"), map_path=str(out_dir / "yard-map.png"),
               window_s=None, threshold_db=10.0, panels_path=str(out_dir / "yard-panels.png"),
               no_reject=False)
    click.echo("== How loud were the bangs, and what reached No. 14?")
    ctx.invoke(cli.level, site_path=str(yard), result_path=str(out_dir / "yard-fix.json"),
               fix_no=None, hemisphere=False, json_path=str(out_dir / "yard-level.json"))
    click.echo("== Where should the recorders stand next time?")
    ctx.invoke(cli.plan, site_path=str(yard), out_path=str(out_dir / "yard-plan.png"),
               json_path=str(out_dir / "yard-plan.json"), timing_sd_s=2e-5, band=None,
               snr_db=None, duration_s=None, grid_step_m=None, extent=None,
               candidates="auto", region="auto", objective="worst", n_propose=1, dims=2,
               source_z_m=1.0)
    for _name, extra in cli.DEMO_STEPS:
        extra(ctx, demo_dir, out_dir)
    click.echo(f"Demo results are in {out_dir}/")
