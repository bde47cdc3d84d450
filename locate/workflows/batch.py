"""Many ``fix`` / ``track`` / ``events`` runs from one manifest, on a local pool or a cluster.

A manifest (TOML, format in docs/batch.md) lists tasks: a site file, a command, an optional
span and the command's options.  Each task runs the same code as the command line (the click
command, in a worker) and returns its result document; the parent writes every result to its
own file atomically, with a ``"batch_task"`` record (name and a fingerprint of the task), so
that ``--resume`` can skip the tasks whose result is already there for the same task.

Workers: a local process pool (``jobs``), or the workers of a Dask distributed scheduler
(``scheduler``; optional extra ``tdoa-locate[cluster]``).  Tasks and results travel the same
way in both, and the summary lists the tasks in manifest order, so the two give identical
files.  A failing task (a corrupt recording, a bad option) is reported with its site and span
and the others go on.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import math
import os
import tempfile
import traceback
from dataclasses import dataclass, field
from pathlib import Path

from locate.errors import NothingFoundError, OptionError, SiteFileError, TdoaError
from locate.io.toml import read_toml
from locate.results.documents import write_json

__all__ = ["Task", "load_manifest", "run_task", "run_tasks", "finished", "summary_document",
           "COMMANDS", "Terminated", "SUMMARY_NAME", "inside"]

COMMANDS = ("fix", "track", "events")
"""Commands a manifest task may run."""

_TASK_KEYS = {"name", "site", "command", "from", "to", "options", "output"}
SUMMARY_NAME = "batch-summary.json"
"""The summary's file name in the output folder; no task may write there."""


class Terminated(KeyboardInterrupt):
    """SIGTERM during a batch: handled like Ctrl-C (workers killed, finished results kept)."""


def inside(path: Path, folder: Path) -> bool:
    """True when ``path`` (resolved: symlinks and ``..``) lies within ``folder`` (resolved)."""
    try:
        Path(os.path.realpath(path)).relative_to(os.path.realpath(folder))
    except ValueError:
        return False
    return True


_BAD_NAME = set('/\\:*?"<>|\0')


@dataclass(frozen=True)
class Task:
    """One manifest task.

    Attributes
    ----------
    name : str
    site : str
        Site file (absolute path).
    command : {'fix', 'track', 'events'}
    start_s, stop_s : float or None
        The span (``from`` / ``to``).
    options : dict
        The command's options by long name without the dashes (``window = 0.5``).
    output : str
        Result file (absolute path).
    """

    name: str
    site: str
    command: str
    start_s: float | None
    stop_s: float | None
    options: dict = field(default_factory=dict)
    output: str = ""

    @property
    def span(self) -> str:
        if self.start_s is None:
            return "whole recording"
        return f"{self.start_s:g}-{self.stop_s:g} s"

    @property
    def fingerprint(self) -> str:
        """sha256 of what the task computes (not where it writes)."""
        key = {"site": self.site, "command": self.command, "from": self.start_s,
               "to": self.stop_s, "options": self.options}
        return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()

    def argv(self, json_path) -> list[str]:
        """Arguments of the ``tdoa`` command line for this task."""
        args = ["--quiet", self.command, self.site]
        if self.start_s is not None:
            args += ["--from", repr(self.start_s), "--to", repr(self.stop_s)]
        for key, value in self.options.items():
            opt = "--" + str(key).replace("_", "-")
            if value is True:
                args.append(opt)
            elif value is not False and value is not None:
                args += [opt, str(value)]
        return args + ["--json", str(json_path)]


def _number(value, where, path):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SiteFileError(f"must be a number of seconds, got {value!r}", file=path,
                            field=where)
    if not math.isfinite(value):
        raise SiteFileError(f"must be a finite number of seconds, got {value!r}", file=path,
                            field=where)
    return float(value)


def _task_name(value, where, path) -> str:
    name = str(value)
    if (not name.strip() or name in (".", "..") or any(c in _BAD_NAME for c in name)
            or any(ord(c) < 32 for c in name) or len(name.encode()) > 200):
        raise SiteFileError(f"task name {name[:60]!r} must be a plain file name (no / \\ : * ? "
                            "\" < > |, not . or .., at most 200 bytes): it names the result "
                            "file", file=path, field=where)
    return name


def load_manifest(path, output_dir=None) -> tuple[list[Task], Path]:
    """Read a batch manifest.

    Returns
    -------
    tasks : list of Task
    output_dir : pathlib.Path

    Parameters
    ----------
    path : path
        The manifest.
    output_dir : path, optional
        The output folder given on the command line (it overrides ``output_dir``).

    Raises
    ------
    locate.errors.SiteFileError
        Unreadable TOML, no ``[[task]]``, unknown command or key, bad span, duplicate name or
        output, or an output folder or result file outside the batch's folder (``..``, an
        absolute path elsewhere, a symlink out): results stay in the manifest's folder or the
        folder given on the command line; the message names the task and key.
    """
    path = Path(path)
    raw = read_toml(path)
    base = path.resolve().parent
    defaults = raw.get("defaults", {})
    if not isinstance(defaults, dict):
        raise SiteFileError("must be a table of options", file=path, field="defaults")
    defaults = dict(defaults)
    wanted = defaults.pop("output_dir", f"{path.stem}-results")
    if output_dir is not None:
        out_dir = Path(output_dir).resolve()
    else:
        out_dir = (base / str(wanted)).resolve()
        if not inside(out_dir, base):
            raise SiteFileError(f"output_dir {str(wanted)!r} leads out of the manifest's folder "
                                f"{str(base)!r}: results stay inside it (give --output-dir on "
                                "the command line to write elsewhere)", file=path,
                                field="defaults.output_dir")
    unknown = set(raw) - {"task", "defaults"}
    if unknown:
        raise SiteFileError(f"unknown key(s) {sorted(unknown)}: a manifest holds [defaults] "
                            "and [[task]] entries", file=path, field=sorted(unknown)[0])
    entries = raw.get("task")
    if not isinstance(entries, list) or not entries:
        raise SiteFileError("no [[task]] entries: list at least one task", file=path,
                            field="task")
    tasks, names, outputs = [], set(), set()
    for k, t in enumerate(entries, 1):
        where = f"task[{k}]"
        bad = set(t) - _TASK_KEYS
        if bad:
            raise SiteFileError(f"unknown key(s) {sorted(bad)}; a task has "
                                f"{sorted(_TASK_KEYS)}", file=path, field=f"{where}.{min(bad)}")
        name = _task_name(t.get("name", f"task-{k}"), f"{where}.name", path)
        if name in names:
            raise SiteFileError(f"task name {name!r} is used twice", file=path,
                                field=f"{where}.name")
        names.add(name)
        if "site" not in t:
            raise SiteFileError("has no site file", file=path, field=f"{where}.site")
        command = t.get("command")
        if command not in COMMANDS:
            raise SiteFileError(f"command {command!r} is not one of {list(COMMANDS)}",
                                file=path, field=f"{where}.command")
        start = _number(t["from"], f"{where}.from", path) if "from" in t else None
        stop = _number(t["to"], f"{where}.to", path) if "to" in t else None
        if (start is None) != (stop is None) or (start is not None and stop <= start):
            raise SiteFileError("give both from and to, with from < to (or neither)",
                                file=path, field=f"{where}.from")
        if command == "track" and start is None:
            raise SiteFileError("a track task needs a span (from, to)", file=path,
                                field=f"{where}.from")
        opts = t.get("options", {})
        if not isinstance(opts, dict):
            raise SiteFileError("must be a table of the command's options", file=path,
                                field=f"{where}.options")
        options = {**defaults, **opts}
        given = str(t.get("output", f"{name}.json"))
        output = (out_dir / given).resolve()
        if not inside(output, out_dir) or output == out_dir:
            raise SiteFileError(f"output {given!r} leads out of the output folder "
                                f"{str(out_dir)!r} ('..', an absolute path or a symlink out): "
                                "name a file inside it", file=path, field=f"{where}.output")
        if output.name == SUMMARY_NAME and output.parent == out_dir:
            raise SiteFileError(f"output {given!r} is the batch summary's name: choose another",
                                file=path, field=f"{where}.output")
        if output == path.resolve():
            raise SiteFileError("output is the manifest itself: choose another name",
                                file=path, field=f"{where}.output")
        if output in outputs:
            raise SiteFileError(f"output {output.name!r} is used by two tasks", file=path,
                                field=f"{where}.output")
        outputs.add(output)
        tasks.append(Task(name=name, site=str((base / str(t["site"])).resolve()),
                          command=command, start_s=start, stop_s=stop, options=options,
                          output=str(output)))
    return tasks, out_dir


def run_task(task: Task, runner) -> dict:
    """Run one task in this process; never raises for a problem with the task.

    ``runner(argv)`` runs one command line (the CLI passes its own; it must be picklable, a
    module-level function, for worker processes) and raises :class:`TdoaError` for a problem
    with the task.

    Returns
    -------
    dict
        ``name``, ``site``, ``span``, ``command``, ``status`` ('ok', 'nothing' or 'failed'),
        ``error`` (one line, or None) and ``result`` (the result document, or None).
    """
    record = {"name": task.name, "site": task.site, "span": task.span,
              "command": task.command, "status": "ok", "error": None, "result": None}
    with tempfile.TemporaryDirectory(prefix="tdoa-batch-") as tmp:
        out = Path(tmp) / "result.json"
        sink = io.StringIO()
        try:
            with contextlib.redirect_stdout(sink), contextlib.redirect_stderr(sink):
                runner(task.argv(out))
            record["result"] = json.loads(out.read_text())
        except NothingFoundError as exc:
            record.update(status="nothing", error=str(exc))
        except TdoaError as exc:
            record.update(status="failed", error=str(exc))
        except OSError as exc:  # the operating system refused (disk full, permissions)
            where = f"{exc.filename}: " if exc.filename else ""
            record.update(status="failed", error=f"{where}{exc.strerror or exc}")
        except MemoryError:
            record.update(status="failed", error="not enough memory for this task: give it a "
                                                 "shorter span or run fewer jobs")
        except Exception as exc:  # anything unexpected: this task only
            last = traceback.format_exception_only(type(exc), exc)[-1].strip()
            record.update(status="failed", error=f"internal error: {last}")
    return record


def _write(task: Task, record: dict) -> None:
    doc = record["result"] if record["result"] is not None else {
        "schema": "tdoa-result/1", "kind": task.command, "site": task.site, "fixes": [],
        "nothing_found": record["error"]}
    doc = dict(doc)
    doc["batch_task"] = {"name": task.name, "fingerprint": task.fingerprint,
                         "span": task.span}
    Path(task.output).parent.mkdir(parents=True, exist_ok=True)
    write_json(task.output, doc)


def finished(task: Task) -> bool:
    """True when ``task.output`` holds this task's result from an earlier run."""
    try:
        doc = json.loads(Path(task.output).read_text())
    except (OSError, ValueError):
        return False
    return isinstance(doc, dict) and doc.get("batch_task", {}).get(
        "fingerprint") == task.fingerprint


def run_tasks(tasks, runner, *, jobs=None, scheduler=None, resume=False,
              on_done=None) -> list[dict]:
    """Run tasks and write their results; one summary record per task, in task order.

    Parameters
    ----------
    tasks : list of Task
    runner : callable
        ``runner(argv)`` runs one command line (see :func:`run_task`).
    jobs : int, optional
        Local worker processes (default: the number of cores; 1 runs in this process).
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:port``); the tasks run on its
        workers, which must see the site and audio files at the same paths.
    resume : bool
        Skip tasks whose result file already holds their result.
    on_done : callable, optional
        Called with each summary record as its task finishes.

    Returns
    -------
    list of dict
        ``name``, ``site``, ``span``, ``command``, ``status`` ('ok', 'nothing', 'failed',
        'skipped'), ``error``, ``output``.
    """
    summary: list = [None] * len(tasks)
    todo = []
    for k, t in enumerate(tasks):
        if resume and finished(t):
            summary[k] = {"name": t.name, "site": t.site, "span": t.span,
                          "command": t.command, "status": "skipped", "error": None,
                          "output": t.output}
            if on_done:
                on_done(summary[k])
        else:
            todo.append(k)

    def done(k, record):
        if record["status"] in ("ok", "nothing"):
            _write(tasks[k], record)
        rec = {key: record[key] for key in ("name", "site", "span", "command", "status",
                                            "error")}
        rec["output"] = tasks[k].output if record["status"] != "failed" else None
        summary[k] = rec
        if on_done:
            on_done(rec)

    if scheduler is not None:
        _run_dask(scheduler, [tasks[k] for k in todo], todo, done, runner)
    elif (jobs or os.cpu_count() or 1) == 1 or len(todo) <= 1:
        for k in todo:
            done(k, run_task(tasks[k], runner))
    else:
        _run_pool(int(jobs or os.cpu_count()), [tasks[k] for k in todo], todo, done, runner)
    return summary


def _ignore_sigint():
    """Worker initialiser: Ctrl-C is the parent's to handle (it stops the pool itself)."""
    import signal
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _stop_pool(pool):
    """Kill the pool's workers now (SIGTERM, then SIGKILL) and wait for them: no orphans.

    The pool then marks the unfinished tasks as broken; finished ones keep their results."""
    workers = list((getattr(pool, "_processes", None) or {}).values())
    for proc in workers:
        with contextlib.suppress(Exception):
            proc.terminate()
    for proc in workers:
        with contextlib.suppress(Exception):
            proc.join(timeout=5)
            if proc.is_alive():
                proc.kill()
                proc.join(timeout=5)
    with contextlib.suppress(Exception):
        pool.shutdown(wait=True)


def _run_pool(jobs, tasks, index, done, runner):
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    ctx = multiprocessing.get_context("spawn")  # no inherited threads or open files
    pool = ProcessPoolExecutor(max_workers=min(jobs, len(tasks)), mp_context=ctx,
                               initializer=_ignore_sigint)
    futures = {}
    handled = set()

    def collect(fut):
        k = futures[fut]
        handled.add(fut)
        try:
            record = fut.result()
        except Exception as exc:  # the worker died (out of memory, killed)
            t = tasks[index.index(k)]
            record = {"name": t.name, "site": t.site, "span": t.span,
                      "command": t.command, "status": "failed", "result": None,
                      "error": f"worker lost: {type(exc).__name__}: {exc}"}
        done(k, record)

    try:
        futures = {pool.submit(run_task, t, runner): k for t, k in zip(tasks, index)}
        for fut in as_completed(futures):
            collect(fut)
    except BaseException:  # Ctrl-C, SIGTERM (Terminated): stop at once, keep what finished
        _stop_pool(pool)
        for fut in list(futures):
            if fut not in handled and fut.done() and not fut.cancelled() \
                    and fut.exception() is None:
                with contextlib.suppress(Exception):
                    collect(fut)  # finished before the interrupt: its result is written
        raise
    pool.shutdown(wait=True)


def connect_scheduler(address):
    """A Dask distributed client on ``address``; one-line OptionErrors naming ``scheduler``
    when Dask is not installed or the scheduler cannot be reached."""
    try:
        from distributed import Client
    except ImportError:
        raise OptionError("needs Dask distributed: pip install 'tdoa-locate[cluster]'",
                          field="scheduler") from None
    try:
        return Client(address, timeout=30)
    except OSError as exc:
        raise OptionError(f"cannot reach the scheduler at {address!r} ({exc})",
                          field="scheduler") from None


def _run_dask(address, tasks, index, done, runner):
    from distributed import as_completed

    client = connect_scheduler(address)
    with client:
        futures = client.map(run_task, tasks, runner=runner, pure=False)
        where = {f.key: k for f, k in zip(futures, index)}
        try:
            _collect_dask(futures, where, tasks, index, done, as_completed)
        except BaseException:  # Ctrl-C, SIGTERM: cancel what is queued or running
            with contextlib.suppress(Exception):
                client.cancel(futures)
            raise


def _collect_dask(futures, where, tasks, index, done, as_completed):
    for fut in as_completed(futures):
        k = where[fut.key]
        try:
            record = fut.result()
        except Exception as exc:  # the worker died
            t = tasks[index.index(k)]
            record = {"name": t.name, "site": t.site, "span": t.span,
                      "command": t.command, "status": "failed", "result": None,
                      "error": f"worker lost: {type(exc).__name__}: {exc}"}
        done(k, record)


def summary_document(tasks, summary) -> dict:
    """The batch summary written beside the results."""
    return {"schema": "tdoa-batch/1", "tasks": summary,
            "counts": {s: sum(1 for r in summary if r["status"] == s)
                       for s in ("ok", "nothing", "failed", "skipped")}}
