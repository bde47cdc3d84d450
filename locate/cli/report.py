"""``tdoa report``: a survey report for a client."""

from __future__ import annotations

import click

from locate.cli.common import (
    announce,
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

    path = make_report(site_path, list(result_paths), out_path, title=title)
    announce(ctx, f"Report written to {path}")
    return path
