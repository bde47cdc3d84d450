"""Declared uncertainties of a survey: what the site file says, with documented defaults.

The budget (:mod:`locate.accuracy.budget`) takes the standard deviations as a plain dict built by
:func:`nuisance_sds` (programmatic use) or :func:`declared_sds` (from a
:class:`locate.io.site.Site`).  The rules and the reasons for the defaults are in
docs/uncertainty.md.
"""

from __future__ import annotations

import numpy as np

from locate.physics import air as _air

__all__ = [
    "TAPED_SURVEY_DEFAULTS",
    "nuisance_sds",
    "declared_sds",
    "has_nuisance",
    "timing_only",
    "TIMING_ONLY",
    "with_source_height",
    "sound_speed_slope_mps_per_c",
]

_DT_STEP_C = 0.5  # central-difference step for dc/dT, degC (c is smooth in T)

TAPED_SURVEY_DEFAULTS = {
    "position_sd_m": 0.05,      # tape and compass survey over tens of metres: +/-5 cm
    "height_sd_m": None,        # None: the mic's horizontal sd (one survey, same care)
    "clock_sd_s": 2e-4,         # separate recorders aligned on a reference sound: +/-0.2 ms
    "temperature_sd_c": 2.0,    # air temperature from a nearby station, not on site: +/-2 degC
    "wind_sd_mps": 1.0,         # hand-held anemometer reading vs. wind along the path
}
"""Defaults that apply when a site file has a ``[survey]`` table but omits a value (common
practice for a taped survey; see docs/uncertainty.md).  Without a ``[survey]`` table nothing
is assumed: undeclared uncertainties are zero."""


def nuisance_sds(n_mics, *, position_sd_m=0.0, height_sd_m=None, clock_sd_s=0.0,
                 clock_group=None, sound_speed_sd_mps=0.0, wind_sd_mps=0.0,
                 temperature_sd_c=0.0, source_height_sd_m=0.0):
    """Declared standard deviations in the form the budget functions take.

    Parameters
    ----------
    n_mics : int
    position_sd_m : float or array_like (N,)
        Horizontal position sd per axis (x and y each), metres.
    height_sd_m : float or array_like (N,), optional
        Height sd, metres (default: ``position_sd_m``).
    clock_sd_s : float or array_like (N,)
        Clock-offset sd, seconds.
    clock_group : array_like of int (N,), optional
        Mics recorded on the same clock (one file) share one group and one clock error,
        whose sd is the largest declared in the group.  Default: every mic its own clock.
    sound_speed_sd_mps : float
        Sound-speed sd, m/s (from the temperature sd: :func:`sound_speed_slope_mps_per_c`).
    wind_sd_mps : float
        sd of each horizontal wind component, m/s.
    temperature_sd_c : float
        Kept for the report only.
    source_height_sd_m : float
        sd of the given source height of a 2-D fix, metres.

    Returns
    -------
    dict
        ``position_m``, ``height_m``, ``clock_s`` (N,) arrays, ``clock_group`` (N,) int,
        ``sound_speed_mps``, ``wind_mps``, ``temperature_c`` floats, ``declared`` (dict of
        bool per component) and ``defaults`` (list of field names that took a default).
    """
    n = int(n_mics)
    pos = np.broadcast_to(np.asarray(position_sd_m, dtype=float), (n,)).copy()
    hgt = pos.copy() if height_sd_m is None else np.broadcast_to(
        np.asarray(height_sd_m, dtype=float), (n,)).copy()
    clk = np.broadcast_to(np.asarray(clock_sd_s, dtype=float), (n,)).copy()
    grp = np.arange(n) if clock_group is None else np.asarray(clock_group, dtype=int).reshape(n)
    for name, v in (("position_sd_m", pos), ("height_sd_m", hgt), ("clock_sd_s", clk),
                    ("sound_speed_sd_mps", sound_speed_sd_mps), ("wind_sd_mps", wind_sd_mps)):
        if not np.all(np.isfinite(v)) or np.any(np.asarray(v) < 0):
            raise ValueError(f"{name} must be finite and >= 0, got {v!r}")
    return {
        "position_m": pos, "height_m": hgt, "clock_s": clk, "clock_group": grp,
        "sound_speed_mps": float(sound_speed_sd_mps), "wind_mps": float(wind_sd_mps),
        "temperature_c": float(temperature_sd_c),
        "declared": {"mic_positions": bool(np.any(pos > 0) or np.any(hgt > 0)),
                     "clocks": bool(np.any(clk > 0)),
                     "sound_speed": float(sound_speed_sd_mps) > 0,
                     "wind": float(wind_sd_mps) > 0,
                     "source_height": float(source_height_sd_m) > 0},
        "source_height_m": float(source_height_sd_m),
        "defaults": [],
    }


def sound_speed_slope_mps_per_c(temperature_c, relative_humidity=0.0, pressure_kpa=101.325):
    """dc/dT of :func:`locate.physics.air.sound_speed_mps` by a central difference, m/s per degC."""
    h = _DT_STEP_C
    up = _air.sound_speed_mps(temperature_c + h, relative_humidity, pressure_kpa)
    down = _air.sound_speed_mps(temperature_c - h, relative_humidity, pressure_kpa)
    return float((up - down) / (2.0 * h))


def declared_sds(site):
    """The declared uncertainties of a :class:`locate.io.site.Site`, with the documented defaults.

    Rules (docs/uncertainty.md):

    * A per-mic value wins, then the ``[survey]`` table's value (the site loader has already
      merged the two into each :class:`~locate.io.site.Mic`).
    * With a ``[survey]`` table, an omitted value takes :data:`TAPED_SURVEY_DEFAULTS`; without
      one, an omitted value is zero (the positions, clocks and air are treated as exact).
    * ``height_sd_m`` omitted: the mic's horizontal ``position_sd_m``.
    * Mics recorded in the same audio file share one sample clock, so their clock errors are one
      error that cancels between them (``clock_group``); the default clock sd applies only when
      there is more than one recorder.
    * ``[air] temperature_sd_c`` becomes a sound-speed sd through dc/dT at the site's air;
      ``wind_sd_mps`` defaults only when a wind is given.

    Returns
    -------
    dict
        As :func:`nuisance_sds`, with ``defaults`` naming the fields that took a default.
    """
    raw = site.raw if isinstance(site.raw, dict) else {}
    survey = isinstance(raw.get("survey"), dict)
    air_raw = raw.get("air") if isinstance(raw.get("air"), dict) else {}
    defaults = set()
    files = [site.mic_source(k)[0] for k in range(len(site.mics))]
    group_of = {f: g for g, f in enumerate(dict.fromkeys(files))}
    groups = np.array([group_of[f] for f in files], dtype=int)
    several_clocks = len(group_of) > 1
    pos, hgt, clk = [], [], []
    for m in site.mics:
        p = m.position_sd_m
        if p is None and survey:
            p = TAPED_SURVEY_DEFAULTS["position_sd_m"]
            defaults.add("position_sd_m")
        h = m.height_sd_m if m.height_sd_m is not None else p
        c = m.clock_sd_s
        if c is None and survey and several_clocks:
            c = TAPED_SURVEY_DEFAULTS["clock_sd_s"]
            defaults.add("clock_sd_s")
        pos.append(p or 0.0)
        hgt.append(h or 0.0)
        clk.append(c or 0.0)
    air = site.air
    if "temperature_sd_c" in air_raw:
        t_sd = float(air.temperature_sd_c)
    elif survey:
        t_sd = TAPED_SURVEY_DEFAULTS["temperature_sd_c"]
        defaults.add("temperature_sd_c")
    else:
        t_sd = 0.0
    if "wind_sd_mps" in air_raw:
        w_sd = float(air.wind_sd_mps)
    elif survey and air.wind_speed_mps > 0:
        w_sd = TAPED_SURVEY_DEFAULTS["wind_sd_mps"]
        defaults.add("wind_sd_mps")
    else:
        w_sd = 0.0
    slope = sound_speed_slope_mps_per_c(air.temperature_c, air.relative_humidity,
                                        air.pressure_kpa)
    out = nuisance_sds(len(site.mics), position_sd_m=pos, height_sd_m=hgt, clock_sd_s=clk,
                       clock_group=groups, sound_speed_sd_mps=abs(slope) * t_sd,
                       wind_sd_mps=w_sd, temperature_sd_c=t_sd)
    out["defaults"] = sorted(defaults)
    return out


TIMING_ONLY = ("timing-only uncertainty: nothing was declared about the mic survey, the "
               "clocks or the air, so they are taken as exact and the ellipse shows the "
               "correlation timing alone")
"""The one sentence every command (and the report, in its own words) gives when nothing but
the timing enters an uncertainty (docs/uncertainty.md, rule 2)."""


def timing_only(sds) -> bool:
    """True when no survey, clock or air uncertainty is declared (the source height's, which
    a 2-D fix always assumes, does not count)."""
    if sds is None:
        return True
    d = sds["declared"]
    return not any(d.get(k) for k in ("mic_positions", "clocks", "sound_speed", "wind"))


def has_nuisance(sds) -> bool:
    """True when any declared nuisance sd is non-zero."""
    return sds is not None and any(sds["declared"].values())


def with_source_height(sds, sd_m, ground_z_m=0.0):
    """``sds`` with the sd of a 2-D fix's given source height (0: the height is exact) and
    the ground's z in the site's frame (heights are kept above it; None: not known)."""
    out = dict(sds)
    out["source_height_m"] = float(sd_m)
    out["ground_z_m"] = ground_z_m
    out["declared"] = {**sds["declared"], "source_height": float(sd_m) > 0}
    return out
