"""Property-based fuzzing (hypothesis): the site parser and the locator either succeed or raise
the one user-facing error type, :class:`locate.errors.TdoaError` - never anything else.

* Site files: a valid site dict perturbed at random (values replaced by other TOML types,
  NaN/inf, huge or negative numbers, keys deleted or misspelt, tables replaced by scalars),
  written as TOML and sometimes damaged as text (characters dropped, inserted or swapped).
  :func:`locate.io.site.load_site` must return a :class:`~locate.io.site.Site` or raise TdoaError;
  when it succeeds, :func:`locate.io.audio.open_recordings` must too.
* Delay sets: random geometry (including coincident, collinear and far-flung mics), delays
  from a random source with noise and with some entries replaced by NaN, inf, huge or random
  values, and random covariances (correlated, diagonal, tiny, huge, zero, infinite).
  :func:`locate.fix.solver.locate_source` must return a Fix with a finite position (and a NaN-free
  covariance) or raise TdoaError (NothingFoundError and ConvergenceError are subclasses).

The example counts below add up to 2 050 in CI; set ``TDOA_FUZZ_EXAMPLES=N`` to run N examples
per property (and a fresh random search instead of the fixed, derandomised one).
"""

from __future__ import annotations

import copy
import math
import os
import string

import numpy as np
import pytest
import soundfile
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st

from locate.errors import TdoaError
from locate.fix.solver import Fix, locate_source, predict_delays
from locate.io.audio import open_recordings
from locate.io.site import Site, load_site
from locate.io.toml import dump_toml
from locate.signal.delays import DelaySet, all_pairs

_EXTRA = os.environ.get("TDOA_FUZZ_EXAMPLES")


def _settings(n_ci):
    """``n_ci`` derandomised examples in CI, or TDOA_FUZZ_EXAMPLES random ones."""
    n = int(_EXTRA) if _EXTRA else n_ci
    return settings(max_examples=n, deadline=None, derandomize=not _EXTRA, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.filter_too_much])


# ------------------------------------------------------------------------------ site files

FS = 8000


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """Audio the fuzzed site files may name: 4-channel WAV, mono WAV, FLAC at another rate,
    and a text file called .wav."""
    f = tmp_path_factory.mktemp("fuzz")
    rng = np.random.default_rng(0)
    soundfile.write(f / "rec.wav", 0.01 * rng.normal(size=(FS // 4, 4)), FS, subtype="FLOAT")
    soundfile.write(f / "m1.wav", 0.01 * rng.normal(size=FS // 4), FS)
    soundfile.write(f / "mono.flac", 0.01 * rng.normal(size=FS // 4), FS // 2)
    (f / "notes.wav").write_text("not audio")
    return f


def _base_site():
    layout = [(0.0, 0.0, 1.2), (40.0, 0.0, 1.5), (40.0, 30.0, 1.3), (0.0, 30.0, 1.2)]
    return {
        "title": "Fuzzed survey at Ashcombe Fen",
        "coordinates": "local",
        "air": {"temperature_c": 6.0, "relative_humidity": 80.0, "pressure_kpa": 101.3,
                "wind_speed_mps": 2.0, "wind_from_deg": 270.0},
        "survey": {"position_sd_m": 0.05},
        "recording": {"file": "rec.wav"},
        "mics": [{"name": f"M{i + 1}", "x": x, "y": y, "z": z, "channel": i + 1}
                 for i, (x, y, z) in enumerate(layout)],
        "receivers": [{"name": "Farmhouse", "x": 80.0, "y": 10.0}],
        "barriers": [{"label": "yard wall", "line": [[10.0, 40.0], [30.0, 40.0]],
                      "height_m": 2.5}],
        "sketch": {"refs": [{"pixel": [0, 0], "at": [0.0, 0.0]},
                            {"pixel": [400, 0], "at": [40.0, 0.0]}],
                   "shapes": [{"label": "barn", "outline": [[5.0, 5.0], [15.0, 5.0],
                                                            [15.0, 12.0]]}]},
    }


_KEYS = ["title", "coordinates", "air", "temperature_c", "relative_humidity", "pressure_kpa",
         "wind_speed_mps", "wind_from_deg", "temperature_sd_c", "sound_speed_mps", "recording",
         "file", "mics", "name", "x", "y", "z", "lat", "lon", "alt", "channel", "offset_s",
         "drift_ppm", "start_time", "full_scale_db_spl", "position_sd_m", "clock_sd_s",
         "receivers", "barriers", "line", "height_m", "sketch", "image", "refs", "shapes",
         "survey", "temprature_c", "mic", "Channel"]

_scalars = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(-1e3, 1e3),
    st.integers(-10**20, 10**20),
    st.integers(-3, 12),
    st.booleans(),
    st.text(max_size=12),
    st.sampled_from(["6,5", "12.0", "local", "wgs84", "rec.wav", "m1.wav", "mono.flac",
                     "notes.wav", "missing.wav", ".", "..", "/", "2026-05-14T21:03:07.250Z",
                     "2026-02-30T00:00:00", "M1", ""]),
    st.datetimes(timezones=st.none()),
)
_nudged = st.one_of(st.floats(-60.0, 110.0), st.floats(-1e7, 1e7),
                    st.sampled_from([0.0, -0.0, 1e-300, 5e-324]))
_values = st.recursive(_scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.sampled_from(_KEYS), inner, max_size=3)),
    max_leaves=6)


def _paths(node, prefix=()):
    """Every (path, value) in a nested dict/list structure."""
    out = [(prefix, node)]
    if isinstance(node, dict):
        for k, v in node.items():
            out += _paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += _paths(v, prefix + (i,))
    return out


@st.composite
def site_dicts(draw):
    d = _base_site()
    if draw(st.booleans()):
        d["coordinates"] = "wgs84"
        for m, (lat, lon) in zip(d["mics"], [(51.0, -1.0), (51.0003, -1.0),
                                             (51.0003, -0.9996), (51.0, -0.9996)]):
            for k in ("x", "y", "z"):
                m.pop(k)
            m.update(lat=lat, lon=lon, alt=60.0)
        d["receivers"] = [{"name": "Farmhouse", "lat": 51.0001, "lon": -0.9990}]
        d["barriers"][0]["line"] = [[51.0004, -0.9998], [51.0004, -0.9994]]
        d["sketch"]["refs"][1]["at"] = [51.0, -0.9996]
        d["sketch"]["refs"][0]["at"] = [51.0, -1.0]
        d["sketch"]["shapes"][0]["outline"] = [[51.0001, -0.9999], [51.0001, -0.9997],
                                               [51.0002, -0.9997]]
    for _ in range(draw(st.sampled_from([0, 1, 1, 1, 1, 2, 2, 3, 4]))):
        paths = [p for p, _ in _paths(d) if p]
        path = draw(st.sampled_from(paths))
        parent = d
        for k in path[:-1]:
            parent = parent[k]
        action = draw(st.sampled_from(["nudge", "nudge", "replace", "replace", "delete", "add",
                                       "duplicate"]))
        value = parent[path[-1]]
        if action == "nudge" and isinstance(value, (int, float)) and not isinstance(value, bool):
            parent[path[-1]] = draw(_nudged) if isinstance(value, float) else draw(
                st.integers(-2, 8))  # same type, another (often odd) value
        elif action in ("nudge", "replace"):
            parent[path[-1]] = draw(_values)
        elif action == "delete":
            del parent[path[-1]]
        elif action == "add" and isinstance(parent, dict):
            parent[draw(st.sampled_from(_KEYS))] = draw(_values)
        elif action == "duplicate" and isinstance(parent, list):
            parent.append(copy.deepcopy(parent[path[-1]]))
    return d


@st.composite
def damaged_text(draw, text):
    chars = list(text)
    for _ in range(draw(st.integers(1, 3))):
        if not chars:
            break
        k = draw(st.integers(0, len(chars) - 1))
        action = draw(st.sampled_from(["drop", "insert", "swap"]))
        if action == "drop":
            del chars[k]
        elif action == "insert":
            chars.insert(k, draw(st.sampled_from(list(string.printable) + ["\x00", "é", "\ufeff"])))
        else:
            j = draw(st.integers(0, len(chars) - 1))
            chars[k], chars[j] = chars[j], chars[k]
    return "".join(chars)


def _load_or_user_error(folder, text, dims, require_audio, *, record=True):
    path = folder / "site.toml"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    try:
        site = load_site(path, dims=dims, require_audio=require_audio)
    except TdoaError as exc:
        assert "\n" not in str(exc) and str(exc).strip()  # one line, not empty
        if record:
            event(f"site refused: {type(exc).__name__}")
        return None
    if record:
        event("site loaded")
    assert isinstance(site, Site)
    assert site.positions_m.shape == (len(site.mics), 3)
    assert np.all(np.isfinite(site.positions_m))
    if require_audio:
        try:
            rec = open_recordings(site)
        except TdoaError as exc:
            assert "\n" not in str(exc)
            return site
        assert rec.n_mics == len(site.mics) and rec.duration_s > 0
    return site


@_settings(850)
@given(site=site_dicts(), dims=st.sampled_from([2, 3]), require_audio=st.booleans())
def test_fuzzed_site_dicts_load_or_raise_a_user_error(folder, site, dims, require_audio):
    try:
        text = dump_toml(site)
    except (TypeError, ValueError):
        assume(False)  # a value TOML cannot hold (e.g. a nested list of tables): not a file
    _load_or_user_error(folder, text, dims, require_audio)


@_settings(500)
@given(data=st.data(), dims=st.sampled_from([2, 3]))
def test_damaged_site_text_loads_or_raises_a_user_error(folder, data, dims):
    text = data.draw(damaged_text(dump_toml(_base_site())))
    _load_or_user_error(folder, text, dims, True)


def test_the_unperturbed_fuzz_base_loads(folder):
    """The strategies start from a valid site (else the fuzz would only test rejections)."""
    site = _load_or_user_error(folder, dump_toml(_base_site()), 2, True, record=False)
    assert site is not None and site.mic_names == ["M1", "M2", "M3", "M4"]


# ------------------------------------------------------------------------------ delay sets

_coords = st.floats(-200.0, 200.0, allow_nan=False)


@st.composite
def geometries(draw):
    n = draw(st.integers(3, 6))
    kind = draw(st.sampled_from(["random", "random", "collinear", "coincident", "far", "tiny"]))
    pts = np.array([[draw(_coords), draw(_coords), draw(st.floats(0.0, 5.0))]
                    for _ in range(n)])
    if kind == "collinear":
        pts[:, 1] = pts[:, 0] * draw(st.floats(-2.0, 2.0)) + draw(st.floats(-1e-3, 1e-3))
    elif kind == "coincident":
        pts[1] = pts[0]
    elif kind == "far":
        pts[-1] = pts[-1] * 1e4
    elif kind == "tiny":
        pts = pts * 1e-4
    return pts


_bad_numbers = st.sampled_from([np.nan, np.inf, -np.inf, 1e300, -1e300, 1e6, 0.0, 5e-324])


@st.composite
def delay_sets(draw, mics):
    n = len(mics)
    pairs = all_pairs(n)
    n_pairs = len(pairs)
    source = np.array([draw(st.floats(-2000.0, 2000.0)), draw(st.floats(-2000.0, 2000.0)),
                       draw(st.floats(-10.0, 50.0))])
    c = draw(st.floats(250.0, 400.0))
    sd = draw(st.sampled_from([1e-9, 1e-6, 2e-5, 1e-3, 1.0]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    delay = predict_delays(source, mics, pairs, c) + sd * rng.normal(size=n_pairs)
    for _ in range(draw(st.integers(0, 3))):
        k = draw(st.integers(0, n_pairs - 1))
        delay[k] = draw(st.one_of(_bad_numbers, st.floats(-1.0, 1.0)))
    form = draw(st.sampled_from(["diagonal", "correlated", "zero", "with-inf", "scaled"]))
    if form == "correlated":
        a = rng.normal(size=(n_pairs, n_pairs))
        cov = sd**2 * (a @ a.T / n_pairs + 0.1 * np.eye(n_pairs))
    elif form == "zero":
        cov = np.zeros((n_pairs, n_pairs))
    else:
        cov = np.diag(np.full(n_pairs, sd**2))
        if form == "with-inf":
            cov[np.diag_indices(n_pairs)] = np.where(rng.random(n_pairs) < 0.3, np.inf, sd**2)
        elif form == "scaled":
            cov = cov * draw(st.sampled_from([1e-30, 1e-12, 1e12, 1e60]))
    quality = tuple(draw(st.sampled_from(["good", "weak", "ambiguous"])) for _ in range(n_pairs))
    ds = DelaySet(pairs=pairs, delay_s=delay, sd_s=np.sqrt(np.diag(cov)), covariance_s2=cov,
                  peak=np.ones(n_pairs), score=np.full(n_pairs, 20.0),
                  second_ratio=np.zeros(n_pairs), quality=quality, t_s=0.0,
                  duration_s=0.5, band_hz=(100.0, 4000.0), sample_rate_hz=48000.0,
                  max_lag_s=np.full(n_pairs, 1.0))
    return ds, c


@_settings(700)
@given(data=st.data(), dims=st.sampled_from([2, 3]), reject=st.booleans(),
       wind=st.sampled_from([None, (3.0, -2.0, 0.0)]), source_z=st.floats(-5.0, 30.0))
def test_locator_returns_a_finite_fix_or_raises_a_user_error(data, dims, reject, wind,
                                                              source_z):
    mics = data.draw(geometries())
    ds, c = data.draw(delay_sets(mics))
    try:
        fx = locate_source(mics, ds, c, wind_mps=wind, dims=dims, source_z_m=source_z,
                           reject=reject)
    except TdoaError as exc:
        assert "\n" not in str(exc) and str(exc).strip()
        event(f"locator refused: {type(exc).__name__}")
        return
    event("fix returned")
    assert isinstance(fx, Fix)
    assert fx.position_m.shape == (3,) and np.all(np.isfinite(fx.position_m))
    assert fx.covariance_m2.shape == (3, 3) and not np.any(np.isnan(fx.covariance_m2))
    assert math.isfinite(fx.residual_rms_s) and fx.used.shape == (len(mics),)
    assert all(isinstance(w, str) and "\n" not in w for w in fx.warnings)


@pytest.mark.parametrize("value", [np.nan, np.inf, 1e300])
def test_a_poisoned_delay_never_leaks_into_the_position(value):
    """Every pair but one is exact (source at (30, 20, 0), c = 340 m/s): the fix comes back
    within a millimetre of the truth (exact synthetic delays; 1 mm is far above rounding)."""
    mics = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1], [2.0, 38.0, 1.3],
                     [20.0, 18.0, 1.0]])
    pairs = all_pairs(5)
    truth = np.array([30.0, 20.0, 0.0])
    delay = predict_delays(truth, mics, pairs, 340.0)
    delay[3] = value
    cov = np.diag(np.full(len(pairs), (1e-6) ** 2))
    ds = DelaySet(pairs=pairs, delay_s=delay, sd_s=np.sqrt(np.diag(cov)), covariance_s2=cov,
                  peak=np.ones(10), score=np.full(10, 20.0), second_ratio=np.zeros(10),
                  quality=("good",) * 10, t_s=0.0, duration_s=0.5, band_hz=(100.0, 4000.0),
                  sample_rate_hz=48000.0, max_lag_s=np.full(10, 0.2))
    fx = locate_source(mics, ds, 340.0)
    assert np.linalg.norm(fx.position_m - truth) < 1e-3
