"""``tdoa batch``."""

from __future__ import annotations

from pathlib import Path

import click

from locate.cli.common import as_options, echo, warn
from locate.errors import NothingFoundError, OptionError, TdoaError

__all__ = ["batch", "run_argv"]


def run_argv(argv):
    """Run one ``tdoa`` command line in this process (a batch task); a usage error becomes an
    :class:`OptionError` so the task's record says what was wrong."""
    from locate.cli import cli

    try:
        cli.main(args=list(argv), prog_name="tdoa", standalone_mode=False)
    except TdoaError as exc:
        raise as_options(exc) from None
    except click.ClickException as exc:
        raise OptionError(exc.format_message(), field="option") from None


@click.command()
@click.argument("manifest_path", metavar="MANIFEST", type=click.Path())
@click.option("--jobs", "-j", type=click.IntRange(1, None), default=None,
              help="Local worker processes (default: the number of cores).")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Run the tasks on a Dask distributed scheduler (tcp://host:port) instead "
                   "of locally; needs tdoa-locate[cluster] and the files at the same paths on "
                   "the workers.")
@click.option("--resume", is_flag=True,
              help="Skip the tasks whose result file already holds their result.")
@click.option("--summary", "summary_path", type=click.Path(dir_okay=False), default=None,
              help="Write the batch summary here (default: batch-summary.json in the output "
                   "folder).")
@click.pass_context
def batch(ctx, manifest_path, jobs, scheduler, resume, summary_path):
    """Run fix / track / events tasks listed in a manifest (see docs/batch.md): one result
    file per task, written atomically; failed tasks are reported and the others finish."""
    from locate.results.documents import write_json
    from locate.workflows.batch import load_manifest, run_tasks, summary_document

    tasks, out_dir = load_manifest(manifest_path)
    out_dir.mkdir(parents=True, exist_ok=True)
    where = f"scheduler {scheduler}" if scheduler else f"{jobs or 'all'} local process(es)"
    echo(ctx, f"{len(tasks)} task(s) from {Path(manifest_path).name} on {where}; results in "
              f"{out_dir}")

    finished = []

    def report(rec):
        finished.append(rec["status"] != "failed")
        label = f"{rec['name']} ({rec['command']}, {Path(rec['site']).name}, {rec['span']})"
        if rec["status"] == "failed":
            warn(f"task {label} failed: {rec['error']}")
        else:
            echo(ctx, f"  {rec['status']:<8} {label}"
                      + (f": {rec['error']}" if rec["error"] else ""))

    try:
        summary = run_tasks(tasks, run_argv, jobs=jobs, scheduler=scheduler, resume=resume,
                            on_done=report)
    except KeyboardInterrupt:
        click.echo(f"tdoa: batch interrupted after {sum(finished)} of {len(tasks)} task(s); "
                   "their results are kept: rerun with --resume to do the rest", err=True)
        raise
    doc = summary_document(tasks, summary)
    write_json(summary_path or out_dir / "batch-summary.json", doc)
    n = doc["counts"]
    echo(ctx, f"{n['ok']} done, {n['nothing']} found nothing, {n['skipped']} skipped "
              f"(finished earlier), {n['failed']} failed")
    if n["failed"]:
        raise NothingFoundError(f"{n['failed']} of {len(tasks)} task(s) failed (see above); "
                                "the others finished: fix the inputs and rerun with --resume")
    return doc
