"""Survey report: one self-contained HTML page (or PDF) from a site and its result files.

:func:`build_report` turns a :class:`locate.io.site.Site` and ``tdoa-result/1`` dicts (kinds
``fix``, ``track``, ``level``) into HTML rendered from ``templates/report.html.j2`` with Jinja2
(autoescaping on).  The page needs nothing but itself: figures are PNG ``data:`` URIs, the CSS
is inline, there are no scripts, fonts or links off the page.  :func:`make_report` is the
``tdoa report`` command's work: read, check, render, write atomically (PDF through headless
Chromium, :mod:`locate.report.chromium`).

What the page says is assembled in :mod:`locate.report.context` (numbers as written by
:mod:`locate.report.format`) and :mod:`locate.report.methods`.
"""

from __future__ import annotations

import base64
import datetime
from pathlib import Path

import numpy as np

from locate import __version__
from locate.errors import OptionError, SiteFileError, TdoaError
from locate.report import context as rc
from locate.report import format as rf
from locate.results.documents import check_same_site, check_schema, fix_label

__all__ = ["KINDS", "SECTIONS", "build_report", "make_report", "check_same_site",
           "recordings_info"]

KINDS = ("fix", "track", "level", "plan")
"""Result kinds a report can show."""

SECTIONS = ("summary", "setup", "maps", "results", "levels", "budget", "methods", "cautions")
"""``id`` of each section, in page order (``levels`` and ``budget`` only when there is one)."""

TITLES = {"summary": "At a glance", "setup": "Survey set-up", "maps": "Site maps",
          "results": "Results", "levels": "Sound levels and receiver predictions",
          "budget": "Uncertainty budget", "methods": "Methods", "cautions": "Cautions and limits"}

_TEMPLATES = Path(__file__).resolve().parent / "templates"

REPORT_LABELS = {"client": "Client", "site_address": "Site address",
                 "job_reference": "Job reference", "author": "Prepared by",
                 "checked_by": "Checked by", "survey_dates": "Survey dates",
                 "revision": "Revision"}
"""Title-block labels of the site file's ``[report]`` fields, in page order."""


# ------------------------------------------------------------------------------- checks

def _check_images(site):
    """The site's sketch image and GeoJSON must exist: a report without them would mislead."""
    sk = site.sketch
    if sk is None:
        return
    for field, path in (("sketch.image", sk.image), ("sketch.geojson", sk.geojson)):
        if path is not None and not Path(path).is_file():
            raise SiteFileError(f"the site image {str(path)!r} is missing: restore it, or "
                                f"remove {field.split('.')[1]} from [sketch], before making a "
                                "report", file=site.path, field=field)


# ------------------------------------------------------------------------------- figures

def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


PRINT_WIDTH_IN = 7.1
"""Width of the text block on an A4 page (210 mm less 2 x 14 mm margins, report.css), inches:
report figures are drawn at this width so their fonts print at their nominal size."""


def map_figure_for_print(site, result, notes):
    """The site map as the report prints it: drawn at the page's text width, the caption
    left for the page (``fig.tdoa_caption``)."""
    from locate.draw import figures as plot

    return plot.map_figure(site, result, warnings=notes, width_in=PRINT_WIDTH_IN,
                           caption_in_figure=False)


def _map_png(site, result, notes) -> tuple[bytes, str]:
    from locate.draw import figures as plot

    fig = map_figure_for_print(site, result, notes)
    return plot.figure_bytes(fig, "png", dpi=200), fig.tdoa_caption


def _plan_png(site, result, notes):
    """The planning map of a ``plan`` result, redrawn from the site with the result's own
    settings (the JSON holds the numbers, not the picture); None, with a note, when the
    recomputation does not give the same proposals (the site file changed since)."""
    from locate.accuracy.plan_site import plan_site
    from locate.draw import figures as plot
    from locate.draw.plan import plan_figure

    timing = result.get("timing") or {}
    sds = timing.get("arrival_sd_s") or []
    grid = result.get("grid") or {}
    xs, ys = grid.get("x_m") or [], grid.get("y_m") or []
    if timing.get("kind") != "arrival_sd" or not sds or len(set(sds)) != 1 or len(xs) < 2 \
            or len(ys) < 2:
        notes.append(f"{result['_label']}: the planning map is not redrawn (its timing model "
                     "is not one arrival-time uncertainty for every mic); its numbers are in "
                     "the at-a-glance section")
        return None
    proposals = result.get("proposals") or []
    region = (result.get("region") or {}).get("kind") or "auto"
    cands = (result.get("candidates") or {}).get("kind")
    res = plan_site(site, timing_sd_s=float(sds[0]), grid_step_m=float(xs[1] - xs[0]),
                    extent_m=(float(xs[0]), float(xs[-1]), float(ys[0]), float(ys[-1])),
                    candidates=cands if proposals else None,
                    region=region if region in ("polygon", "receivers", "extent") else "auto",
                    dims=int(result.get("dims", 2)),
                    source_z_m=float(result.get("source_z_m", 0.0)),
                    objective=result.get("objective", "worst"), n_propose=len(proposals),
                    max_semi_major_m=result.get("limit_m") if result.get("target_given")
                    else None)
    again = [p.position_m[:2] for p in res.proposals]
    if len(again) != len(proposals) or any(
            float(np.hypot(*(np.asarray(a, float) - np.asarray(p["position_m"][:2], float))))
            > 0.01 for a, p in zip(again, proposals, strict=True)):
        notes.append(f"{result['_label']}: the planning map is not redrawn: the site file no "
                     "longer gives the same proposal (rerun the planning)")
        return None
    fig = plan_figure(res, site, width_in=PRINT_WIDTH_IN)
    caption = getattr(fig, "tdoa_caption", "")
    return plot.figure_bytes(fig, "png", dpi=200), caption


def _plan_summary(result):
    """One sentence for the plan's figure caption."""
    frac = result.get("locatable_fraction")
    text = []
    if result.get("target_given"):
        text.append(f"{rf.percent(frac, 0)} of the mapped area is located to within "
                    f"{rf.length(result.get('limit_m'))} (95 % semi-major)")
    for r in result.get("receivers") or []:
        if isinstance(r, dict) and r.get("name"):
            text.append(f"at {r['name']} a fix is expected to within "
                        f"{rf.length(r.get('semi_major_m'))} (95 % semi-major)")
    for p in result.get("proposals") or []:
        pos = p["position_m"]
        text.append(f"one more microphone at ({rf.num(pos[0], 0)}, {rf.num(pos[1], 0)}) m would "
                    f"bring the {'worst' if result.get('objective') != 'mean' else 'mean'} "
                    f"expected semi-major over the area of interest from "
                    f"{rf.length(p.get('metric_before_m'))} to "
                    f"{rf.length(p.get('metric_after_m'))}")
    return "; ".join(text)


def _map_alt(site, result):
    names = ", ".join(site.mic_names)
    rec = ", ".join(r.name for r in site.receivers)
    if result.get("kind") == "track":
        tr = result.get("track") or {}
        what = (f"the track of a moving source ({len(tr.get('points') or [])} points) heading "
                f"{rf.degrees(tr.get('heading_deg'))} at {rf.num(tr.get('speed_mps'), 1, 'm/s')}"
                ", with 95 % confidence ellipses along it")
    else:
        fixes = result.get("fixes") or []
        where = "; ".join(f"fix {fix_label(f, k)} at x {rf.num(f['position_m'][0], 1)} m, y "
                          f"{rf.num(f['position_m'][1], 1)} m" for k, f in enumerate(fixes, 1))
        what = f"{len(fixes)} located position(s) with 95 % confidence ellipses ({where})"
    return (f"Site map of {site.title}, local metres with north up: {len(site.mics)} "
            f"microphones ({names}) and {what}"
            + (f"; receivers: {rec}" if rec else "") + ".")


def _level_png(lev) -> bytes:
    """Source sound power and the receivers' levels, each panel on its own reference."""
    from locate.draw.levels import level_png

    return level_png(lev)


def _level_alt(section, lev):
    lw = [v for v in lev["source_lw_db"] if v is not None]
    peak = ""
    if lw:
        k = int(np.nanargmax([np.nan if v is None else v for v in lev["source_lw_db"]]))
        peak = (f"; highest in the {lev['bands_hz'][k]:g} Hz band at "
                f"{rf.db(lev['source_lw_db'][k])} dB")
    bounds = [b for b, u in zip(lev["bands_hz"], lev.get("source_lw_is_upper_bound") or [])
              if u]
    bound = (f"; the {', '.join(f'{b:g}' for b in bounds)} Hz band(s) are upper bounds only "
             "(hatched, with a downward arrow)" if bounds else "")
    rec = "; ".join(f"{r['name']} {r['lpa']} dB(A)" for r in section["receivers"])
    return (f"Two bar charts. Top: the source sound power level per octave band for "
            f"{section['what']}, dB re 1 pW, A-weighted total {section['lwa']} dB{peak}{bound}; "
            "error bars show the spread between microphones. "
            + (f"Bottom: the predicted sound pressure level at the receivers, dB re 20 µPa "
               f"({rec})." if rec else ""))


# ------------------------------------------------------------------------------- the page

def _environment():
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_TEMPLATES)), autoescape=True,
                             trim_blocks=True, lstrip_blocks=True,
                             undefined=jinja2.StrictUndefined, finalize=rf.client_words)
    return env


def build_report(site, results, *, title=None, files=None, recordings=None, generated=None):
    """The survey report as one self-contained HTML page.

    Parameters
    ----------
    site : locate.io.site.Site
    results : list of dict
        ``tdoa-result/1`` dicts of kind ``fix``, ``track`` or ``level`` made from ``site``.
    title : str, optional
        Page title (default: the site's title).
    files : list of str, optional
        The result files' names, as shown in the report and named in errors.
    recordings : dict, optional
        Audio facts from :func:`recordings_info`; None leaves the recordings table out.
    generated : str, optional
        Date shown as "prepared on" (default: today, ISO 8601).

    Returns
    -------
    str
        HTML.

    Raises
    ------
    locate.errors.ResultFileError
        A result of another schema, kind or site (field ``mics``).
    locate.errors.SiteFileError
        The site's sketch image or GeoJSON is missing.
    """
    if not results:
        raise OptionError("give at least one result file", field="RESULT")
    labels = list(files) if files is not None else [f"result {k}" for k in
                                                    range(1, len(results) + 1)]
    results = [dict(r, _label=lab) if isinstance(r, dict) else r
               for r, lab in zip(results, labels, strict=True)]
    notes = []
    for r, lab in zip(results, labels, strict=True):
        check_schema(r, file=lab, kinds=KINDS, reader="a report")
        notes += check_same_site(site, r, lab)
    _check_images(site)

    maps = []
    for r in results:
        if r["kind"] in ("fix", "track"):
            caption = ("The moving source's track over the site, with the microphones"
                       if r["kind"] == "track" else
                       "Where the sounds came from: the located positions and their ellipses "
                       "among the microphones") + (" and receivers" if site.receivers else "")
            png, details = _map_png(site, r, notes)
            maps.append({"src": _data_uri(png), "alt": _map_alt(site, r),
                         "caption": caption, "details": details, "label": r["_label"]})
    for r in results:
        if r["kind"] != "plan":
            continue
        drawn = _plan_png(site, r, notes)
        if drawn is not None:
            maps.append({"src": _data_uri(drawn[0]),
                         "alt": f"Planning map of {site.title}: the expected size of the 95 % "
                                "ellipse of a fix at each point for the microphone layout"
                                + (" and with the proposed microphone" if r.get("proposals")
                                   else ""),
                         "caption": "Where this microphone layout can locate a sound, and "
                                    "where one more microphone would help most: "
                                    + _plan_summary(r),
                         "details": drawn[1], "label": r["_label"]})
    fix_sets = [rc.fix_section(r, site) for r in results if r["kind"] == "fix"]
    tracks = [rc.track_section(r, site) for r in results if r["kind"] == "track"]
    levels = []
    for r in results:
        if r["kind"] != "level":
            continue
        for lev, section in zip(rc.level_entries(r), rc.level_sections(r, site), strict=True):
            if any(v is not None for v in lev.get("source_lw_db") or []):
                section["chart"] = {"src": _data_uri(_level_png(lev)),
                                    "alt": _level_alt(section, lev)}
            else:
                section["chart"] = None
            levels.append(section)
    budgets = [b for r in results if r["kind"] == "fix" for b in rc.budget_sections(r)]
    shown = [s for s in SECTIONS if (s != "levels" or levels) and (s != "budget" or budgets)]
    context = {
        "toc": [{"id": s, "n": str(k), "title": TITLES[s]} for k, s in enumerate(shown, 1)],
        "title": title or site.title,
        "site_title": site.title,
        "site_file": site.path.name,
        "title_block": [{"label": REPORT_LABELS[k], "value": v}
                        for k, v in getattr(site, "report", {}).items()],
        "generated": generated or datetime.date.today().isoformat(),
        "version": __version__,
        "inputs": [{"file": r["_label"], "kind": r["kind"],
                    "made": (r.get("tool") or {}).get("version", "")} for r in results],
        "summary": rc.summary_lines(results, site),
        "setup": rc.setup_section(site, results, recordings),
        "maps": maps,
        "fix_sets": fix_sets,
        "tracks": tracks,
        "levels": levels,
        "budgets": budgets,
        "methods": rc.methods_section(site, results),
        "cautions": rc.cautions_of(results),
        "notes": list(dict.fromkeys(notes)),
    }
    return _environment().get_template("report.html.j2").render(**context)


# ------------------------------------------------------------------------------- I/O edge

def recordings_info(site):
    """Sample rates, lengths and the common span of the site's recordings, for the report.

    Returns
    -------
    dict
        See :func:`locate.report.context.setup_section`; ``error`` set (and no files) when
        the recordings cannot be opened now (moved or archived).
    """
    import soundfile

    from locate.io.audio import open_recordings

    try:
        rec = open_recordings(site)
    except TdoaError as exc:
        return {"error": f"the recordings could not be opened when this report was made "
                         f"({exc.message})", "files": []}
    by_file = {}
    for name, path, _ch in rec.files:
        by_file.setdefault(path, []).append(name)
    files = []
    for path, names in by_file.items():
        info = soundfile.info(str(path))
        files.append({"file": Path(path).name, "channels": int(info.channels),
                      "sample_rate_hz": float(info.samplerate),
                      "duration_s": float(info.frames) / float(info.samplerate),
                      "mics": names})
    return {"error": None, "files": files, "start_s": rec.start_s, "stop_s": rec.stop_s}


_SUFFIXES = {".html": "html", ".htm": "html", ".pdf": "pdf"}


def _refuse_input(out, inputs):
    for p in inputs:
        if p is not None and out.resolve() == Path(p).resolve():
            raise OptionError("is one of the inputs: choose another output path (inputs are "
                              "never overwritten)", file=out, field="-o")


def make_report(site_path, result_paths, out_path, *, title=None, generated=None) -> Path:
    """Read a site and its results, check them, and write the report (HTML or PDF).

    Parameters
    ----------
    site_path : path
    result_paths : sequence of path
        Result JSON files (kinds ``fix``, ``track``, ``level``) made from this site.
    out_path : path
        ``.html`` / ``.htm`` or ``.pdf`` (printed by headless Chromium); never an input.
    title : str, optional
    generated : str, optional
        "Prepared on" date (default today).

    Returns
    -------
    pathlib.Path
        The file written (atomically).
    """
    from locate.io.site import load_site
    from locate.report import chromium
    from locate.results.documents import (
        check_output_paths,
        read_result,
        reading_result,
        write_atomic,
    )

    out = Path(out_path)
    if not result_paths:
        raise OptionError("give at least one result file", field="RESULT")
    _refuse_input(out, [site_path, *result_paths])
    fmt = _SUFFIXES.get(out.suffix.lower())
    if fmt is None:
        raise OptionError(f"cannot write a report as {out.suffix or 'a file without extension'!r}"
                          ": use .html or .pdf", file=out, field="-o")
    site = load_site(site_path, require_audio=False)
    inputs = [site.path, site.recording_file, *[Path(p) for p in result_paths],
              *[m.file for m in site.mics]]
    if site.sketch is not None:
        inputs += [site.sketch.image, site.sketch.geojson]
    _refuse_input(out, inputs)
    check_output_paths({"-o": out}, inputs)
    if fmt == "pdf":
        chromium.require_chromium()  # before the work: "not found, write HTML instead"
    results = [read_result(p, kinds=KINDS) for p in result_paths]
    for r, p in zip(results, result_paths, strict=True):
        check_same_site(site, r, str(p))  # the error names the file as given
    with reading_result(", ".join(str(p) for p in result_paths)):
        html = build_report(site, results, title=title,
                            files=[Path(p).name for p in result_paths],
                            recordings=recordings_info(site), generated=generated)
    data = chromium.print_pdf(html) if fmt == "pdf" else html
    return write_atomic(out, data)
