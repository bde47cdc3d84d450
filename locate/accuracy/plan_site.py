"""Planning a site: the map, the region of interest and the proposed mics from a site file.

:func:`plan_site` is what ``tdoa plan`` calls; the computation is in :mod:`locate.accuracy.plan`.

Site-file keys read here (both optional; mics may be planned, with no recording yet)::

    [[candidates]]          # where a new mic could go (for --candidates site)
    name = "C1"             # optional, default C1, C2, ...
    x = 60.0                # or lat/lon for coordinates = "wgs84"
    y = -10.0
    z = 1.5                 # optional (alt for WGS84): default the median mic height

    [region]                # the area of interest for proposals
    outline = [[40, -20], [120, -20], [120, 60], [40, 60]]   # [x, y] (or [lat, lon]) vertices
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from locate.accuracy import plan as pl
from locate.accuracy.timing import TimingModel, timing_model
from locate.errors import OptionError, SiteFileError

__all__ = ["PlanResult", "plan_site", "site_candidates", "site_region_outline",
           "DEFAULT_TIMING_SD_S"]

DEFAULT_TIMING_SD_S = 2e-5
"""Arrival-time sd per mic assumed when neither a timing nor a band is given (a clean,
broadband sound at good SNR; common practice for planning)."""

_CANDIDATE_KEYS = {"local": ("name", "x", "y", "z"), "wgs84": ("name", "lat", "lon", "alt")}
_GRID_CELLS = 200  # default map resolution: cells along the longer side
_REGION_GRID = 40  # points per side when the whole map is the region


def _err(site, fld, msg):
    return SiteFileError(msg, file=site.path, field=fld)


def _number(site, table, key, fld):
    v = table.get(key)
    if isinstance(v, bool) or not isinstance(v, int | float) or not np.isfinite(v):
        raise _err(site, fld, f"must be a number, got {v!r}")
    return float(v)


def _to_local(site, lat, lon, alt):
    from locate.geometry import frames as geo

    if site.origin_wgs84 is None:
        raise _err(site, "coordinates", "WGS84 points need the site's origin (the mics)")
    return np.asarray(geo.enu_from_wgs84(lat, lon, alt, site.origin_wgs84), float)


def site_candidates(site):
    """Candidate mic positions from the site file's ``[[candidates]]``.

    Returns
    -------
    (names, positions_m (K, 3)) or None when the file has none.

    Raises
    ------
    SiteFileError
        Naming ``candidates[k].x`` etc. for a missing or non-numeric value or an unknown key.
    """
    raw = site.raw.get("candidates")
    if raw is None:
        return None
    if not isinstance(raw, list) or not raw or not all(isinstance(c, dict) for c in raw):
        raise _err(site, "candidates", "must be one or more [[candidates]] tables with x and y")
    keys = _CANDIDATE_KEYS[site.coordinates]
    z0 = float(np.median(site.positions_m[:, 2]))
    names, pts = [], []
    for k, c in enumerate(raw):
        where = f"candidates[{k}]"
        for key in c:
            if key not in keys:
                raise _err(site, f"{where}.{key}", f'unknown key "{key}": the valid keys are '
                           + ", ".join(keys))
        name = c.get("name", f"C{k + 1}")
        if not isinstance(name, str) or not name.strip():
            raise _err(site, f"{where}.name", f"must be a non-empty string, got {name!r}")
        a, b = (_number(site, c, key, f"{where}.{key}") for key in keys[1:3])
        h = _number(site, c, keys[3], f"{where}.{keys[3]}") if keys[3] in c else None
        if site.coordinates == "wgs84":
            p = _to_local(site, a, b, site.origin_wgs84[2] if h is None else h)
            if h is None:
                p[2] = z0
        else:
            p = np.array([a, b, z0 if h is None else h])
        names.append(name.strip())
        pts.append(p)
    if len(set(names)) != len(names):
        raise _err(site, "candidates", "candidate names must be unique")
    return names, np.array(pts)


def site_region_outline(site):
    """The ``[region] outline`` polygon in local metres, shape (K, 2), or None."""
    raw = site.raw.get("region")
    if raw is None:
        return None
    if not isinstance(raw, dict) or set(raw) - {"outline"} or "outline" not in raw:
        raise _err(site, "region", "must be a [region] table with one key, outline = "
                   "[[x, y], ...]")
    v = raw["outline"]
    if (not isinstance(v, list) or len(v) < 3
            or not all(isinstance(p, list) and len(p) == 2 for p in v)):
        raise _err(site, "region.outline", "must be a list of at least 3 [x, y] vertices"
                   + (" ([lat, lon] for WGS84 sites)" if site.coordinates == "wgs84" else ""))
    pts = np.array([[_number(site, {"v": q}, "v", f"region.outline[{k}]") for q in p]
                    for k, p in enumerate(v)])
    if site.coordinates == "wgs84":
        pts = _to_local(site, pts[:, 0], pts[:, 1], site.origin_wgs84[2])[:, :2]
    return pts


@dataclass
class PlanResult:
    """What :func:`plan_site` found (arrays in local metres; grids (ny, nx), row = y)."""

    site: str
    title: str
    mic_names: list
    mic_positions_m: np.ndarray
    receivers: list  # (name, position (3,))
    grid: dict  # expected_ellipse_grid output
    timing: TimingModel
    dims: int
    source_z_m: float
    probability: float
    sound_speed_mps: float
    extent_m: tuple
    objective: str
    region_kind: str | None = None  # 'polygon', 'receivers', 'extent', 'given'
    region_outline_m: np.ndarray | None = None
    region_points_m: np.ndarray | None = None
    candidate_kind: str | None = None  # 'site', 'grid', 'given'
    candidates_m: np.ndarray | None = None
    candidate_names: list | None = None
    proposals: list = field(default_factory=list)
    ranking: list = field(default_factory=list)
    grid_after: dict | None = None  # the map with the proposed mics added
    region_before: tuple | None = None  # (unlocatable count, metric m)
    receiver_ellipses: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    target_given: bool = False  # the limit is the user's target, not the map's size

    @property
    def locatable_fraction(self) -> float:
        return float(np.mean(self.grid["locatable"]))

    def to_dict(self) -> dict:
        """JSON-ready dict, schema ``tdoa-result/1``, ``"kind": "plan"``; null = not locatable."""
        g = self.grid

        def field_(a, digits):
            a = np.where(g["locatable"], np.round(a, digits), np.nan)
            return [[None if not np.isfinite(v) else float(v) for v in row] for row in a]

        def sig(a):
            return np.asarray([float(f"{v:.4g}") if np.isfinite(v) else np.inf
                               for v in np.ravel(a)]).reshape(np.shape(a))

        out = {
            "schema": "tdoa-result/1", "kind": "plan", "site": self.site, "title": self.title,
            "sound_speed_mps": float(self.sound_speed_mps), "dims": int(self.dims),
            "source_z_m": float(self.source_z_m), "probability": float(self.probability),
            "timing": self.timing.to_dict(), "warnings": list(self.warnings),
            "mics": [{"name": n, "position_m": [float(v) for v in p]}
                     for n, p in zip(self.mic_names, self.mic_positions_m, strict=True)],
            "limit_m": float(g["max_semi_major_m"]), "target_given": self.target_given,
            "locatable_fraction": self.locatable_fraction,
            "grid": {"x_m": [float(v) for v in g["xs_m"]], "y_m": [float(v) for v in g["ys_m"]],
                     "semi_major_m": field_(sig(g["semi_major_m"]), 9),
                     "semi_minor_m": field_(sig(g["semi_minor_m"]), 9),
                     "azimuth_deg": field_(g["azimuth_deg"], 1)},
            "receivers": [dict(name=n, **{k: pl.finite_or_none(v) for k, v in e.items()})
                          for (n, _p), e in zip(self.receivers, self.receiver_ellipses,
                                                strict=True)],
        }
        if self.candidates_m is not None:
            out["objective"] = self.objective
            out["region"] = {"kind": self.region_kind, "n_points": int(len(self.region_points_m)),
                             "outline_m": None if self.region_outline_m is None else
                             [[float(v) for v in p] for p in self.region_outline_m],
                             "unlocatable": int(self.region_before[0]),
                             "metric_m": pl.finite_or_none(self.region_before[1])}
            out["candidates"] = {"kind": self.candidate_kind, "count": int(len(self.candidates_m))}
            out["proposals"] = [p.to_dict() for p in self.proposals]
            out["ranking"] = [p.to_dict() for p in self.ranking]
        return out


def _as_points(value, z, fld):
    a = np.asarray(value, dtype=float)
    if a.ndim != 2 or a.shape[1] not in (2, 3) or not np.all(np.isfinite(a)):
        raise OptionError(f"points must have shape (K, 2) or (K, 3), got {a.shape!r}",
                          field=fld)
    return a if a.shape[1] == 3 else np.column_stack([a, np.full(len(a), float(z))])


def _extent(pos, extras, extent_m, *, pad_frac=0.6, pad_min_m=10.0):
    if extent_m is not None:
        x0, x1, y0, y1 = (float(v) for v in extent_m)
        if not (x1 > x0 and y1 > y0):
            raise OptionError(f"extent must be x0, x1, y0, y1 with x1 > x0 and y1 > y0, got "
                              f"{tuple(extent_m)!r}", field="extent_m")
        return x0, x1, y0, y1
    xy = np.vstack([pos[:, :2]] + [e[:, :2] for e in extras if e is not None and len(e)])
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    pad = max(pad_frac * float((hi - lo).max()), pad_min_m)
    return lo[0] - pad, hi[0] + pad, lo[1] - pad, hi[1] + pad


def declared_arrival_cov_s2(site, sound_speed_mps):
    """Arrival-time covariance (N, N) s^2 from the site's declared survey and clock sds.

    A horizontal position error of sd s per axis moves a mic's arrival time by its projection
    on the direction to the source, sd s / c whatever that direction (first order, as the fix's
    budget, JCGM 100:2008); clock errors add their variance, shared by the mics of one clock
    (one audio file), whose common error cancels between them.  Sound-speed and wind sds are
    left out (they scale with the distance to each mic, not per mic).
    """
    from locate.accuracy.inputs import declared_sds

    sds = declared_sds(site)
    n = len(site.mics)
    cov = np.diag((np.asarray(sds["position_m"], float) / float(sound_speed_mps)) ** 2)
    clk, grp = np.asarray(sds["clock_s"], float), np.asarray(sds["clock_group"], int)
    for g in np.unique(grp):
        members = grp == g
        cov[np.ix_(members, members)] += float(clk[members].max()) ** 2 if members.any() else 0.0
    return cov.reshape(n, n)


def plan_site(site, *, timing_sd_s=None, band_hz=None, snr_db=None, duration_s=None,
              grid_step_m=None, extent_m=None, candidates=None, region=None, dims=2,
              source_z_m=0.0, objective="worst", n_propose=1, probability=0.95,
              max_semi_major_m=None, n_ranked=5):
    """Expected accuracy map of the site's mic layout and, with candidates, the next mic(s).

    Parameters
    ----------
    site : locate.io.site.Site
        Mics (planned positions are enough), receivers, air (sound speed, wind), raw keys
        ``candidates`` and ``region`` (module docstring).
    timing_sd_s, band_hz, snr_db, duration_s
        Timing model: a given arrival-time sd per mic, or the sound's band, in-band SNR and
        duration (:func:`locate.accuracy.timing.timing_model`).
    grid_step_m : float, optional
        Map spacing; default 1/200 of the longer side.
    extent_m : (x0, x1, y0, y1), optional
        Mapped area; default the box around mics, receivers, candidates and region, padded by
        60 % of its longer side (at least 10 m).
    candidates : None, 'site', 'grid', 'auto' or array_like (K, 2|3)
        None: no proposal.  'site': the file's ``[[candidates]]``; 'grid': a 25 x 25 grid
        over the box around mics, receivers and region (padded by 10 %, at least 5 m), at the
        median mic height; 'auto': the file's if any, else the grid.
    region : None, 'auto', 'polygon', 'receivers', 'extent' or array_like (R, 2|3)
        Region of interest for the proposals; 'auto' (default): the file's ``[region]``, else
        the receivers, else the whole map.  Points are at ``source_z_m``.
    dims : {2, 3}
    source_z_m : float
        Height of the mapped plane (the source height for 2-D fixes).
    objective : {'worst', 'mean'}
    n_propose : int
        Mics to propose greedily.
    probability : float
    max_semi_major_m : float, optional
        Larger expected ellipses count as un-locatable (default: the map's longer side).
    n_ranked : int
        Alternatives kept for the first proposal.

    Returns
    -------
    PlanResult

    Raises
    ------
    SiteFileError, OptionError
    """
    pos = site.positions_m
    if len(pos) < dims + 1:
        raise SiteFileError(f"a {dims}-D plan needs at least {dims + 1} mics, the site has "
                            f"{len(pos)}: add [[mics]] (planned positions are enough)",
                            file=site.path, field="mics")
    pl.check_objective(objective)
    c = site.air.sound_speed_mps()
    wind = site.air.wind_mps() if site.air.wind_speed_mps else None
    tm = timing_model(len(pos), timing_sd_s=timing_sd_s, band_hz=band_hz, snr_db=snr_db,
                      duration_s=duration_s).with_declared(declared_arrival_cov_s2(site, c))
    z_mic = float(np.median(pos[:, 2]))
    rec_pos = np.array([[*r.position_m[:2], source_z_m] for r in site.receivers]).reshape(-1, 3)
    outline = site_region_outline(site)

    cand_kind, cand, cand_names = None, None, None
    file_cands = site_candidates(site)
    if isinstance(candidates, str):
        if candidates not in ("site", "grid", "auto"):
            raise OptionError(f'candidates must be "site", "grid" or "auto", got {candidates!r}',
                              field="candidates")
        if candidates == "site" and file_cands is None:
            raise _err(site, "candidates", "no [[candidates]] in the site file: add some, or "
                       "use --candidates grid")
        cand_kind = "site" if candidates != "grid" and file_cands is not None else "grid"
        if cand_kind == "site":
            cand_names, cand = file_cands
    elif candidates is not None:
        cand_kind, cand = "given", _as_points(candidates, z_mic, "candidates")
        cand_names = [f"C{k + 1}" for k in range(len(cand))]

    reg_arr = None
    if region is not None and not isinstance(region, str):
        reg_arr = _as_points(region, source_z_m, "region")
    extent = _extent(pos, [rec_pos, cand, outline, reg_arr], extent_m)
    x0, x1, y0, y1 = extent
    step = float(grid_step_m) if grid_step_m else max(x1 - x0, y1 - y0) / _GRID_CELLS
    if not step > 0:
        raise OptionError(f"grid step must be positive metres, got {grid_step_m!r}",
                          field="grid_step_m")
    xs = np.arange(x0, x1 + 0.5 * step, step)
    ys = np.arange(y0, y1 + 0.5 * step, step)
    kw = dict(sound_speed_mps=c, timing=tm, dims=dims, wind_mps=wind, probability=probability)
    grid = pl.expected_ellipse_grid(pos, xs, ys, source_z_m=source_z_m,
                                    max_semi_major_m=max_semi_major_m, **kw)
    limit = grid["max_semi_major_m"]
    rec_e = []
    if len(rec_pos):
        e = pl.expected_ellipses(rec_pos, pos, max_semi_major_m=limit, **kw)
        rec_e = [{k: float(e[k][i]) for k in ("semi_major_m", "semi_minor_m", "azimuth_deg")}
                 for i in range(len(rec_pos))]
    res = PlanResult(site=str(site.path), title=site.title, mic_names=site.mic_names,
                     mic_positions_m=pos, receivers=[(r.name, r.position_m) for r in
                                                     site.receivers],
                     grid=grid, timing=tm, dims=dims, source_z_m=float(source_z_m),
                     probability=float(probability), sound_speed_mps=c, extent_m=extent,
                     objective=objective, receiver_ellipses=rec_e, warnings=list(site.warnings),
                     target_given=max_semi_major_m is not None)
    frac = 1.0 - res.locatable_fraction
    if frac >= 0.005:
        res.warnings.append(f"{100 * frac:.0f} % of the mapped area cannot be located")
    if cand_kind is None:
        return res

    if cand_kind == "grid":  # over the site itself (mics, receivers, region), not the padding
        x0c, x1c, y0c, y1c = _extent(pos, [rec_pos, outline, reg_arr], None, pad_frac=0.1,
                                     pad_min_m=5.0)
        cand = pl.candidate_grid((x0c, x1c, y0c, y1c), z_m=z_mic, avoid_m=pos)
        cand_names = [f"({c[0]:.0f}, {c[1]:.0f})" for c in cand]  # named by where it stands
    region = "auto" if region is None else region
    if reg_arr is not None:
        kind, pts = "given", reg_arr
    elif region not in ("auto", "polygon", "receivers", "extent"):
        raise OptionError(f'region must be "auto", "polygon", "receivers" or "extent", got '
                          f"{region!r}", field="region")
    elif region == "polygon" or (region == "auto" and outline is not None):
        if outline is None:
            raise _err(site, "region", "no [region] outline in the site file: add one, or use "
                       "--region receivers or extent")
        kind, pts = "polygon", pl.points_in_polygon(outline, z_m=source_z_m)
    elif region == "receivers" or (region == "auto" and len(rec_pos)):
        if not len(rec_pos):
            raise _err(site, "receivers", "no [[receivers]] in the site file to form the "
                       "region of interest: add some, or use --region extent")
        kind, pts = "receivers", rec_pos
    else:
        gx = np.linspace(x0, x1, _REGION_GRID)
        gy = np.linspace(y0, y1, _REGION_GRID)
        xx, yy = np.meshgrid(gx, gy)
        kind, pts = "extent", np.column_stack([xx.ravel(), yy.ravel(),
                                               np.full(xx.size, float(source_z_m))])
    kw["max_semi_major_m"] = limit
    res.region_before = pl.region_metric(pos, pts, objective=objective, **kw)
    res.ranking = pl.propose_next_mic(pos, cand, pts, objective=objective,
                                      candidate_names=cand_names, **kw)[: int(n_ranked)]
    res.proposals = [] if int(n_propose) == 0 else pl.propose_mics(
        pos, cand, pts, k=n_propose, objective=objective, candidate_names=cand_names, **kw)
    new = np.vstack([pos] + [p.position_m[None] for p in res.proposals])
    kw["timing"] = tm.with_mics(len(res.proposals))
    res.grid_after = pl.expected_ellipse_grid(new, xs, ys, source_z_m=source_z_m, **kw)
    res.region_kind, res.region_outline_m, res.region_points_m = (
        kind, outline if kind == "polygon" else None, pts)
    res.candidate_kind, res.candidates_m, res.candidate_names = cand_kind, cand, cand_names
    return res
