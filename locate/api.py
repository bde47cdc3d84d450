"""The public Python API: what the ``tdoa`` commands do, as functions (see docs/api.md).

Every function here calls the same workflow code as the command line, so a result from Python
equals the command's JSON for the same inputs (same ellipses, budget and warnings).  Site
arguments take a path or a :class:`~locate.io.site.Site` from :func:`load_site`.

Examples
--------
>>> import locate
>>> site = locate.load_site(locate.demo_dir() / "yard.toml")
>>> [m.name for m in site.mics][:3]
['NW-gate', 'NE-shed', 'E-fence']
"""

from __future__ import annotations

from pathlib import Path

from locate.errors import OptionError
from locate.io.audio import open_recordings
from locate.io.site import Site
from locate.io.site import load_site as _load_site
from locate.physics.air import sound_speed_mps
from locate.signal.delays import estimate_delays
from locate.workflows.locating import list_events, locate_recordings

__all__ = ["load_site", "open_recordings", "estimate_delays", "locate", "locate_sources",
           "detect_events", "sound_levels", "plan", "write_result", "read_result",
           "sound_speed_mps",
           "demo_dir"]


def load_site(path, *, dims: int = 2, require_audio: bool = True) -> Site:
    """Read and validate a site file (TOML, docs/site-file.md).

    Parameters
    ----------
    path : str or os.PathLike
    dims : {2, 3}
        The fixes planned: 3-D needs mics at several heights.
    require_audio : bool
        False to load a layout without recordings (planning).
    """
    return _load_site(path, dims=dims, require_audio=require_audio)


def _site(site, dims=2, require_audio=True) -> Site:
    return site if isinstance(site, Site) else _load_site(site, dims=dims,
                                                          require_audio=require_audio)


def _band(band_hz):
    if band_hz is None:
        return None
    lo, hi = (float(b) for b in band_hz)
    return lo, hi


def locate(site, *, start_s=None, stop_s=None, window_s=None, band_hz=None, dims=2,
           source_z_m=None, source_z_sd_m=None, sound_speed_mps=None, threshold_db=10.0,
           reject=True, solve_air=False, solve_wind=False) -> dict:
    """Locate a stationary source, as ``tdoa fix`` does.

    Without a span every detected event is fixed; with ``start_s``/``stop_s`` one fix of the
    span; with ``window_s`` too, one fix per window.  ``source_z_m`` (2-D fixes) is the
    source height with its uncertainty ``source_z_sd_m``; without it the command's default
    (1 m +- 0.6 m, "assumed") is used; given without an sd it carries 0.5 m.

    Returns
    -------
    dict
        The ``tdoa-result/1`` document ``tdoa fix --json`` writes (``fixes`` with
        ``position_m``, ``covariance_m2``, ``ellipse95``, ``uncertainty_budget``, ``warnings``).

    Examples
    --------
    >>> import locate
    >>> result = locate.locate(locate.demo_dir() / "yard.toml", source_z_m=1.0)
    >>> len(result["fixes"]) >= 1 and result["kind"]
    'fix'
    """
    if (start_s is None) != (stop_s is None):
        raise OptionError("give both start_s and stop_s, or neither", field="start_s")
    from locate.workflows.fixing import resolve_source_height

    z = 0.0 if source_z_m is None else float(source_z_m)
    if source_z_m is not None and z == 0.0 and source_z_sd_m is None:
        source_z_sd_m = 0.5  # a given 0 m (resolve_source_height reads a bare 0.0 as unset)
    z, z_sd, basis = resolve_source_height(z, source_z_sd_m, dims)
    s = _site(site, dims)
    return locate_recordings(s, open_recordings(s), start_s=start_s, stop_s=stop_s,
                             window_s=window_s, band_hz=_band(band_hz), dims=dims,
                             source_z_m=z, source_z_sd_m=z_sd, source_z_basis=basis,
                             sound_speed_mps=sound_speed_mps,
                             threshold_db=threshold_db, reject=reject, solve_air=solve_air,
                             solve_wind=solve_wind)


def locate_sources(site, start_s, stop_s, *, sources="auto", band_hz=None, source_z_m=1.0,
                   sound_speed_mps=None, reject=True) -> dict:
    """Every source that stands out of one span, each fixed with its band, as
    ``tdoa fix --from A --to B --sources N|auto`` does (2-D, at height ``source_z_m``).

    Returns
    -------
    dict
        A ``tdoa-result/1`` document of kind ``fix``: one entry of ``fixes`` per source with
        ``source``, ``band_hz``, ``bands``, ``tonal`` and ``map_peak_m``; ``sources`` says how
        many were asked for and found; ``warnings`` name any source that stood out of the
        maps but could not be fixed apart from the others.
    """
    from locate.workflows.sources import locate_sources as _locate_sources
    from locate.workflows.sources import parse_sources

    s = _site(site)
    result, _ = _locate_sources(s, open_recordings(s), float(start_s), float(stop_s),
                                sources=parse_sources(sources), band_hz=_band(band_hz),
                                source_z_m=float(source_z_m),
                                sound_speed_mps=sound_speed_mps, reject=reject)
    return result


def detect_events(site, *, start_s=None, stop_s=None, band_hz=None, threshold_db=10.0) -> dict:
    """The detected events of a span, as ``tdoa events --json`` writes them.

    Examples
    --------
    >>> import locate
    >>> doc = locate.detect_events(locate.demo_dir() / "yard.toml")
    >>> doc["kind"], len(doc["events"]) >= 1
    ('events', True)
    """
    s = _site(site)
    return list_events(s, open_recordings(s), start_s=start_s, stop_s=stop_s,
                       band_hz=_band(band_hz), threshold_db=threshold_db)


def sound_levels(site, result, *, fix_no=None, hemisphere=False, ground=None) -> dict:
    """Source sound power per octave band and the levels at the site's receivers, as
    ``tdoa level --json`` writes them.

    Parameters
    ----------
    site : path or Site
    result : path or dict
        A fix result (every fix, or the ``fix_no``-th, 1-based) or a track result (a pass-by:
        LAFmax with its time and LAE at the receivers), e.g. from :func:`locate`.
    hemisphere : bool
        Source on hard ground radiating into a half space.
    ground : float, optional
        ISO 9613-2 ground factor G (0 hard ... 1 porous); default no ground effect.

    Examples
    --------
    >>> import locate
    >>> fixes = locate.locate(locate.demo_dir() / "yard.toml", source_z_m=1.0)
    >>> doc = locate.sound_levels(locate.demo_dir() / "yard.toml", fixes, fix_no=1)
    >>> doc["kind"], len(doc["source_lw_db"]) == len(doc["bands_hz"])
    ('level', True)
    """
    from locate.results.documents import check_same_site
    from locate.results.documents import read_result as _read
    from locate.workflows.level import levels_of_result

    s = _site(site)
    path = None
    if not isinstance(result, dict):
        path = Path(result)
        result = _read(path, kinds=("fix", "track"))
    check_same_site(s, result, path if path is not None else "result")
    return levels_of_result(s, open_recordings(s), result, result_path=path, fix_no=fix_no,
                            hemisphere=hemisphere, ground=ground)


def plan(site, *, timing_sd_s=None, band_hz=None, snr_db=None, duration_s=None, dims=2,
         source_z_m=0.0, n_propose=1, objective="worst", grid_step_m=None,
         extent_m=None) -> dict:
    """Expected 95 % ellipse size over the site and the best next mic(s), as ``tdoa plan``.

    With neither ``timing_sd_s`` nor ``band_hz`` the timing is the same default as the
    command's (:data:`locate.accuracy.plan_site.DEFAULT_TIMING_SD_S`).
    """
    from locate.accuracy.plan_site import DEFAULT_TIMING_SD_S, plan_site

    s = _site(site, dims, require_audio=False)
    if timing_sd_s is None and band_hz is None:
        timing_sd_s = DEFAULT_TIMING_SD_S
    res = plan_site(s, timing_sd_s=timing_sd_s, band_hz=_band(band_hz), snr_db=snr_db,
                    duration_s=duration_s, grid_step_m=grid_step_m, extent_m=extent_m,
                    candidates="auto" if n_propose else None, region="auto", dims=dims,
                    source_z_m=source_z_m, objective=objective, n_propose=n_propose)
    return res.to_dict()


def write_result(path, result: dict) -> Path:
    """Write a result document as JSON, atomically (never half a file)."""
    from locate.results.documents import write_json

    return write_json(path, result)


def read_result(path, *, kinds=None) -> dict:
    """Read and check a result JSON file (schema ``tdoa-result/1``)."""
    from locate.results.documents import read_result as _read

    return _read(path, kinds=kinds)


def demo_dir() -> Path:
    """The folder of the bundled demo recordings (invented scenes)."""
    from locate.workflows.demo_data import demo_dir as _demo_dir

    return _demo_dir()
