"""``tdoa report``: a survey report for a client."""

from __future__ import annotations

import click

from locate.cli.common import (
    announce,
    progress_bar,
    transactional,
)


@click.command()
@click.argument("site_path", metavar="SITE", type=click.Path())
@click.argument("result_paths", metavar="RESULT.json...", nargs=-1, required=True,
                type=click.Path())
@click.option("-o", "--output", "out_path", required=True, type=click.Path(dir_okay=False),
              help="report.html (one self-contained page) or report.pdf (needs Chromium).")
@click.option("--title", default=None, help="Report title (default: the site's title).")
@click.pass_context
@transactional
def report(ctx, site_path, result_paths, out_path, title):
    """A survey report for a client: set-up, maps, results, levels, methods and cautions,
    from the site file and its fix, track and level results."""
    from locate.report.build import make_report

    with progress_bar(ctx, 1, "Drawing and writing the report") as bar:
        path = make_report(site_path, list(result_paths), out_path, title=title)
        bar.update(1)
    announce(ctx, f"Report written to {path}")
    return path
