"""Site files: the survey description (TOML) as validated, immutable dataclasses.

:func:`load_site` reads a site file (format: "Site file" in the design notes), checks every field
and returns a :class:`Site`.  Each problem raises :class:`locate.errors.SiteFileError` whose
message is one line naming the file and the field (``mics[2].channel``: index of the
``[[mics]]`` table counted from 0, in file order) and saying what to do.  Doubtful but usable
geometry (mics nearly on one line, coincident mics, ...) becomes a string in
:attr:`Site.warnings`.

Field getters live in :mod:`locate.io.site_fields`, table parsing and range checks in
:mod:`locate.io.site_tables`; this module assembles the dataclasses, converts WGS84 positions
to local metres (:mod:`locate.geometry.frames`) and checks the array geometry.

Example
-------
>>> site = load_site("survey/site.toml")            # doctest: +SKIP
>>> site.positions_m.shape, site.air.sound_speed_mps()  # doctest: +SKIP
((6, 3), 335.5)
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from locate.errors import OptionError
from locate.io import site_fields as sf
from locate.io import site_tables as st
from locate.io.toml import dump_toml, read_toml
from locate.physics import air as _air

__all__ = ["Air", "Mic", "Receiver", "Barrier", "Sketch", "Site", "load_site", "dump_site_toml",
           "parse_start_time", "start_time_offsets_s", "COINCIDENT_M", "LINE_RATIO"]

COINCIDENT_M = 0.01  # mics closer than this are "at the same place"
LINE_RATIO = 0.05  # smallest/largest singular value of the centred layout below this: degenerate

parse_start_time = sf.parse_start_time


def _frozen_array(a) -> np.ndarray:
    arr = np.array(a, dtype=float)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True)
class Air:
    """State of the air during the recording (all values per the site file ``[air]`` table)."""

    temperature_c: float
    relative_humidity: float
    pressure_kpa: float = 101.325
    wind_speed_mps: float = 0.0
    wind_from_deg: float = 0.0
    temperature_sd_c: float = 0.0
    wind_sd_mps: float = 0.0
    sound_speed_override_mps: float | None = None

    def sound_speed_mps(self) -> float:
        """Sound speed in still air, m/s: the override if set, else Cramer (1993) via air.py."""
        if self.sound_speed_override_mps is not None:
            return float(self.sound_speed_override_mps)
        return float(_air.sound_speed_mps(self.temperature_c, self.relative_humidity,
                                          self.pressure_kpa))

    def wind_mps(self) -> np.ndarray:
        """Wind velocity ``(3,)`` m/s (the way the air moves), from speed and from-direction."""
        return np.asarray(_air.wind_vector_mps(self.wind_speed_mps, self.wind_from_deg), float)


@dataclass(frozen=True, eq=False)
class Mic:
    """One microphone.

    ``file`` is the mic's own audio file (absolute); ``None`` means the site's
    ``[recording] file``.  When the site file gives a glob or a list, ``files`` holds every
    file (placed in time by :mod:`locate.io.filesets`) and ``file`` is the first.
    ``channel`` is 1-based.  Clock model: mic sample k (mic time tau = k / fs) was recorded
    at common time t = offset_s + tau / (1 + drift_ppm 1e-6).
    ``geodetic`` is (lat_deg, lon_deg, alt_m) for WGS84 sites.
    """

    name: str
    position_m: np.ndarray
    channel: int | None = None
    file: Path | None = None
    offset_s: float = 0.0
    drift_ppm: float = 0.0
    start_time: str | None = None
    files: tuple[Path, ...] | None = None  # a recorder's many files (file = glob or list)
    files_order: str | None = None  # "name" (a glob's natural order) or "list" (as given)
    time_zone: str | None = None  # the recorder clock's zone (bext stamps carry none)
    full_scale_db_spl: float | None = None
    position_sd_m: float | None = None
    height_sd_m: float | None = None
    clock_sd_s: float | None = None
    geodetic: tuple[float, float, float] | None = None


@dataclass(frozen=True, eq=False)
class Receiver:
    """A named point of interest (dwelling, boundary), local metres ``(3,)``."""

    name: str
    position_m: np.ndarray
    geodetic: tuple[float, float, float] | None = None


@dataclass(frozen=True, eq=False)
class Barrier:
    """A screening wall along a horizontal polyline ``(K, 2)`` with a top height (m)."""

    label: str
    line_m: np.ndarray
    height_m: float


@dataclass(frozen=True, eq=False)
class Sketch:
    """What maps are drawn over: an image with control points and/or outlines.

    ``refs`` is a tuple of ``(pixel (2,), at (2,))`` with ``at`` in local metres;
    ``shapes`` a tuple of ``dict(label=str, outline=ndarray (K, 2))`` in local metres.
    """

    image: Path | None
    refs: tuple
    shapes: tuple
    geojson: Path | None


@dataclass(frozen=True, eq=False)
class Site:
    """A validated site file.  ``raw`` is the parsed TOML as a dict (for rewriting)."""

    path: Path
    title: str
    coordinates: str
    air: Air
    recording_file: Path | None
    mics: tuple[Mic, ...]
    receivers: tuple[Receiver, ...] = ()
    barriers: tuple[Barrier, ...] = ()
    sketch: Sketch | None = None
    origin_wgs84: tuple[float, float, float] | None = None
    warnings: tuple[str, ...] = ()
    raw: dict = field(default_factory=dict)
    report: dict = field(default_factory=dict)  # [report] title-block fields (client, ...)

    @property
    def positions_m(self) -> np.ndarray:
        """Mic positions, shape ``(N, 3)``, metres."""
        return np.stack([m.position_m for m in self.mics]).astype(float)

    @property
    def mic_names(self) -> list[str]:
        return [m.name for m in self.mics]

    def mic_index(self, name: str) -> int:
        """Index of the mic called ``name``; :class:`OptionError` naming the choices if none."""
        names = self.mic_names
        if name in names:
            return names.index(name)
        lower = {n.lower(): n for n in names}
        close = difflib.get_close_matches(str(name).lower(), list(lower), n=1)
        close = [lower[c] for c in close]
        hint = f'did you mean "{close[0]}"?' if close else "the mics are " + ", ".join(names)
        raise OptionError(f'no mic named "{name}": {hint}', file=self.path)

    def mic_source(self, index: int) -> tuple[Path | None, int]:
        """``(audio file, 1-based channel)`` that mic ``index`` is recorded in."""
        m = self.mics[index]
        return (m.file if m.file is not None else self.recording_file,
                m.channel if m.channel is not None else 1)


def dump_site_toml(site_raw: dict) -> str:
    """TOML text for a (possibly modified) raw site dict; ``load_site`` reads it back."""
    return dump_toml(site_raw)


def start_time_offsets_s(mics) -> np.ndarray | None:
    """Seconds from the earliest ``start_time`` to each mic's, ``(N,)``; None without times.

    Exact to the digits given (whole seconds and fractions are differenced separately).
    """
    if not any(m.start_time for m in mics):
        return None
    parsed = [parse_start_time(m.start_time) for m in mics]
    whole = np.array([p[0] for p in parsed], dtype=np.int64)
    frac = np.array([p[1] for p in parsed], dtype=float)
    rel = (whole - whole.min()).astype(float) + frac
    return rel - rel.min()


# ------------------------------------------------------------------------------------ loading

def load_site(path, *, dims: int = 2, require_audio: bool = True) -> Site:
    """Read and validate a site file.

    Parameters
    ----------
    path : str or os.PathLike
        The ``.toml`` site file.  Relative paths inside it are relative to its folder.
    dims : {2, 3}
        Intended fix dimension: 3 or more mics are needed for 2-D, 4 or more for 3-D.
    require_audio : bool
        If True (default) every mic must have a readable recording and its channel must exist.
        If False (planning a layout before recording) missing audio becomes a warning.

    Returns
    -------
    Site

    Raises
    ------
    SiteFileError
        Any problem; the message names the file and field.
    """
    if dims not in (2, 3):
        raise OptionError(f"dims must be 2 or 3, got {dims!r}", field="dims")
    raw = read_toml(path)
    ctx = sf.Context(path)
    warnings: list[str] = []
    sf.check_keys(ctx, raw, st.TOP_KEYS, "")
    title = sf.get_str(ctx, raw, "title", "title") or Path(path).stem
    coords = sf.get_coordinates(ctx, raw)
    air = Air(**st.parse_air(ctx, raw, warnings))
    survey = st.parse_survey(ctx, raw)
    recording_file = st.parse_recording(ctx, raw)
    mic_dicts = st.parse_mics(ctx, raw, coords, survey, recording_file, warnings,
                              dims=dims, require_audio=require_audio)

    origin = None
    if coords == "wgs84":
        geod = np.array([[m["lat"], m["lon"], m["alt"]] for m in mic_dicts])
        origin = st.mean_origin(geod)
        to_local = _wgs84_to_local(origin)
        enu = to_local(geod[:, 0], geod[:, 1], geod[:, 2])
        for m, p, g in zip(mic_dicts, enu, geod, strict=True):
            m["position_m"] = p
            m["geodetic"] = tuple(float(v) for v in g)
    else:
        to_local = None
    for m in mic_dicts:
        for k in ("lat", "lon", "alt"):
            m.pop(k, None)
    mics = tuple(Mic(**{**m, "position_m": _frozen_array(m["position_m"])}) for m in mic_dicts)
    warnings.extend(_geometry_warnings(ctx, mics, dims))

    receivers = tuple(
        Receiver(r["name"], _frozen_array(r["position_m"]), r.get("geodetic"))
        for r in st.parse_receivers(ctx, raw, coords, to_local))
    barriers = tuple(Barrier(b["label"], _frozen_array(b["line_m"]), b["height_m"])
                     for b in st.parse_barriers(ctx, raw, coords, to_local))
    sk = st.parse_sketch(ctx, raw, coords, to_local, warnings)
    sketch = None if sk is None else Sketch(**sk)
    return Site(path=ctx.path.resolve(), title=title, coordinates=coords, air=air,
                recording_file=recording_file, mics=mics, receivers=receivers,
                barriers=barriers, sketch=sketch, origin_wgs84=origin,
                warnings=tuple(warnings), raw=raw, report=st.parse_report(ctx, raw))


def _wgs84_to_local(origin):
    from locate.geometry import frames as geo

    def convert(lat, lon, alt=None):
        """(K, 3) local metres; ``alt=None`` puts the points at the origin's altitude."""
        return geo.enu_from_wgs84(lat, lon, origin[2] if alt is None else alt, origin)

    convert.origin = origin

    return convert


def _geometry_warnings(ctx, mics, dims) -> list[str]:
    """Warnings (and the one error: all mics in one place) about the array layout."""
    p = np.stack([m.position_m for m in mics])
    names = [m.name for m in mics]
    out = []
    d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
    if np.max(d) < COINCIDENT_M:
        raise ctx.error("mics", "all mics are at the same place (within 1 cm): give each mic "
                        "its own measured position")
    for i, j in zip(*np.nonzero(np.triu(d < COINCIDENT_M, k=1)), strict=True):
        out.append(f'mics "{names[i]}" and "{names[j]}" are {100 * d[i, j]:.1f} cm apart '
                   "(less than 1 cm): the same position entered twice?")
    horiz = np.linalg.svd(p[:, :2] - p[:, :2].mean(axis=0), compute_uv=False)
    if horiz[0] > 0 and horiz[-1] < LINE_RATIO * horiz[0]:
        out.append("poor geometry: mics are nearly on one line; fixes will be ambiguous "
                   "across it (move a mic off the line)")
    if dims == 3:
        full = np.linalg.svd(p - p.mean(axis=0), compute_uv=False)
        if full[0] > 0 and full[-1] < LINE_RATIO * full[0]:
            out.append("poor geometry for 3-D: mics are nearly in one plane; the source height "
                       "is poorly determined (raise or lower some mics by a few metres)")
    return out
