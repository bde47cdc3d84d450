"""``tdoa batch``."""

from __future__ import annotations

import contextlib
import signal
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
@click.option("--output-dir", "output_dir", type=click.Path(file_okay=False), default=None,
              help="Write the results into this folder (default: the manifest's output_dir, "
                   "which must lie inside the manifest's folder).")
@click.pass_context
def batch(ctx, manifest_path, jobs, scheduler, resume, summary_path, output_dir=None):
    """Run fix / track / events tasks listed in a manifest (see docs/batch.md): one result
    file per task, written atomically; failed tasks are reported and the others finish."""
    from locate.results.documents import check_output_path, write_json
    from locate.workflows.batch import SUMMARY_NAME, load_manifest, run_tasks, summary_document

    tasks, out_dir = load_manifest(manifest_path, output_dir=output_dir)
    inputs = [Path(manifest_path)] + _site_files(tasks)
    given = summary_path
    summary_path = Path(summary_path) if summary_path else out_dir / SUMMARY_NAME
    _check_summary(summary_path, tasks, inputs)
    if given and Path(given).resolve().parent != out_dir:
        check_output_path(given, inputs, option="--summary")
    out_dir.mkdir(parents=True, exist_ok=True)
    where = f"scheduler {scheduler}" if scheduler else f"{jobs or 'all'} local process(es)"
    echo(ctx, f"{len(tasks)} task(s) from {Path(manifest_path).name} on {where}; results in "
              f"{out_dir}")

    finished = []

    done = []

    def report(rec):
        finished.append(rec["status"] != "failed")
        done.append(rec)
        count = f"[{len(done)}/{len(tasks)}]"  # progress: tasks end in any order
        label = f"{rec['name']} ({rec['command']}, {Path(rec['site']).name}, {rec['span']})"
        if rec["status"] == "failed":
            warn(f"{count} task {label} failed: {rec['error']}")
        else:
            echo(ctx, f"  {count} {rec['status']:<8} {label}"
                      + (f": {rec['error']}" if rec["error"] else ""))

    try:
        with _sigterm_stops():
            summary = run_tasks(tasks, run_argv, jobs=jobs, scheduler=scheduler,
                                resume=resume, on_done=report)
    except KeyboardInterrupt:
        click.echo(f"tdoa: batch interrupted after {sum(finished)} of {len(tasks)} task(s); "
                   "their results are kept: rerun with --resume to do the rest", err=True)
        raise
    doc = summary_document(tasks, summary)
    write_json(summary_path, doc)
    n = doc["counts"]
    echo(ctx, f"{n['ok']} done, {n['nothing']} found nothing, {n['skipped']} skipped "
              f"(finished earlier), {n['failed']} failed")
    if n["failed"]:
        raise NothingFoundError(f"{n['failed']} of {len(tasks)} task(s) failed (see above); "
                                "the others finished: fix the inputs and rerun with --resume")
    return doc


def _site_files(tasks):
    """The site files of the tasks and the files they name (recordings, sketch): inputs no
    result may overwrite.  A site that does not load is left to its task to report."""
    from locate.cli.common import load, site_inputs

    files = []
    for site_path in dict.fromkeys(t.site for t in tasks):
        files.append(Path(site_path))
        try:
            files += site_inputs(load(site_path, require_audio=False))
        except TdoaError:
            continue
    return list(dict.fromkeys(files))


def _check_summary(summary_path, tasks, inputs):
    """Before any work (output folder not made yet): the summary is no task's result and no
    input; task results are no input."""
    from locate.results.documents import same_file

    for t in tasks:
        if same_file(summary_path, t.output):
            raise OptionError(f"is also the result of task {t.name!r}: give the summary "
                              "another name", file=str(summary_path), field="--summary")
    for p in [summary_path] + [Path(t.output) for t in tasks]:
        for inp in inputs:
            if same_file(p, inp):
                raise OptionError(f"this is one of the inputs ({inp}): choose another output "
                                  "path", file=str(p), field="output")


@contextlib.contextmanager
def _sigterm_stops():
    """SIGTERM (a kill, a scheduler's time limit) stops the batch like Ctrl-C: the pool's
    workers are killed, the finished results kept (:class:`~locate.workflows.batch.Terminated`).
    """
    from locate.workflows.batch import Terminated

    def stop(signum, frame):
        raise Terminated()

    try:
        old = signal.signal(signal.SIGTERM, stop)
    except ValueError:  # not the main thread: leave the signals alone
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old)
