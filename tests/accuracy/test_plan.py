"""Tests for array planning: locate.accuracy.timing, locate.accuracy.plan,
locate.accuracy.plan_site, locate.draw.plan.

References: the Cramer-Rao bound of the locator as computed point by point by
locate.geometry.ellipses.crlb_covariance (Chan & Ho 1994 form, pseudo-inverse over pairs); Carter
(1987) for the delay bound; the textbook arrival-time bound for a known signal in white noise;
and a Monte Carlo of the real locator on simulated audio (locate.synth -> estimate_delays ->
locate_source).
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pytest
from scipy import fft as sfft

from locate import synth
from locate.accuracy.plan import (
    candidate_grid,
    expected_ellipse_grid,
    expected_ellipses,
    points_in_polygon,
    propose_mics,
    propose_next_mic,
    region_metric,
)
from locate.accuracy.plan_site import plan_site
from locate.accuracy.timing import (
    carter_delay_sd_s,
    in_band_snr_db,
    timing_from_spectra,
    timing_model,
)
from locate.draw.plan import plan_figure
from locate.errors import OptionError, SiteFileError
from locate.fix.solver import locate_source
from locate.geometry.ellipses import crlb_covariance, ellipse
from locate.geometry.pairs import incidence_matrix
from locate.io.site import Air, Mic, Receiver, Site
from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s

M = 1.0  # unit: metre
MM = 1e-3
NM = 1e-9
US = 1e-6  # unit: microsecond
NS = 1e-9
DB = 1.0
DEG = 1.0

C = 343.0
SQUARE = np.array([[0, 0, 1.2], [40, 0, 1.2], [40, 30, 1.2], [0, 30, 1.2], [20, 45, 1.5]])


def _site(mics, *, receivers=(), raw=None, title="Test farm"):
    return Site(path=Path("/nonexistent/plan-test.toml"), title=title, coordinates="local",
                air=Air(20.0, 50.0, sound_speed_override_mps=C), recording_file=None,
                mics=tuple(Mic(f"M{k + 1}", np.asarray(p, float)) for k, p in enumerate(mics)),
                receivers=tuple(Receiver(n, np.asarray(p, float)) for n, p in receivers),
                raw=raw or {})


# --------------------------------------------------------------------------- timing model

def test_carter_white_band_bound_matches_its_closed_form():
    # Carter 1987 eq. for a white-in-band sound: integral of (2 pi f)^2 over the band is
    # (2 pi)^2 (f2^3 - f1^3) / 3; the model integrates numerically over 256 cells
    tm = timing_model(5, band_hz=(300.0, 3000.0), snr_db=[10, 4, 0, -3, 7], duration_s=0.2)
    cov = tm.pair_covariance_s2()
    pairs = all_pairs(5)
    want = carter_delay_sd_s((300.0, 3000.0), 0.2, tm.snr_db[pairs[:, 0]], tm.snr_db[pairs[:, 1]])
    np.testing.assert_allclose(np.sqrt(np.diag(cov)), want, atol=0.01 * NS)  # midpoint rule


def test_high_snr_arrival_bound_is_the_known_signal_bound():
    # textbook time-of-arrival bound for a known signal in white noise (from memory):
    # var = 1 / ((2E/N0) beta^2), beta^2 = (2 pi)^2 (f2^3 - f1^3) / (3 B), 2E/N0 = 2 snr B T
    lo, hi, t, snr = 200.0, 2000.0, 0.5, 10.0 ** (30 / 10)
    beta2 = (2 * np.pi) ** 2 * (hi**3 - lo**3) / (3 * (hi - lo))
    want = 1.0 / np.sqrt(2 * snr * (hi - lo) * t * beta2)
    tm = timing_model(3, band_hz=(lo, hi), snr_db=30.0, duration_s=t)
    np.testing.assert_allclose(tm.equivalent_arrival_sd_s(), want, atol=0.01 * NS)
    # at high SNR the pair delay error is the difference of two arrival errors
    cov = tm.pair_covariance_s2()
    assert np.sqrt(cov[0, 0]) == pytest.approx(np.sqrt(2) * want, abs=0.001 * want)
    # pairs (0,1) and (0,2) share mic 0: covariance var_0 (from the phase-error model)
    assert cov[0, 1] == pytest.approx(want**2, rel=2e-3)


def test_flat_spectrum_model_equals_the_white_band_model():
    # same integrand, given as spectra: Carter 1987 with constant gamma^2 over the band
    f = np.linspace(300.0, 3000.0, 400)
    snr = np.full((4, f.size), 10 ** 0.6)
    a = timing_from_spectra(f, snr, 0.3).pair_covariance_s2()
    b = carter_delay_sd_s((f[0] - 0.5 * (f[1] - f[0]), f[-1] + 0.5 * (f[1] - f[0])), 0.3, 6.0)
    np.testing.assert_allclose(np.sqrt(np.diag(a)), b, atol=0.001 * NS)


def test_independent_arrival_weights_equal_the_pair_pseudo_inverse():
    # M = W - w w^T / sum(w) (emission time eliminated) equals A^T (A diag(sd^2) A^T)^+ A
    # (numpy.linalg.pinv as the reference)
    sd = np.array([20, 50, 80, 35, 60]) * US
    tm = timing_model(5, timing_sd_s=sd)
    a = incidence_matrix(all_pairs(5), 5)
    ref = a.T @ np.linalg.pinv((a * sd**2) @ a.T) @ a
    np.testing.assert_allclose(tm.information_weights(), ref, rtol=1e-9, atol=1e-6 / US**2)


def test_in_band_snr_adds_the_noise_outside_the_band():
    # common practice: white noise power scales with bandwidth; half of 0..fs/2 -> +3.01 dB
    assert float(in_band_snr_db(0.0, (0.0, 4000.0), 16000.0)) == pytest.approx(3.0103, abs=1e-4)
    assert float(in_band_snr_db(5.0, (0.0, 8000.0), 16000.0)) == pytest.approx(5.0, abs=1e-9)


# --------------------------------------------------------------------------- the bound map

@pytest.mark.parametrize("dims", [2, 3])
@pytest.mark.parametrize("spec", [dict(timing_sd_s=[40e-6, 60e-6, 50e-6, 45e-6, 80e-6]),
                                  dict(band_hz=(250.0, 2500.0), snr_db=3.0, duration_s=0.4)])
def test_batched_ellipses_match_crlb_covariance_point_by_point(dims, spec):
    # reference: locate.geometry.ellipses.crlb_covariance + ellipse at each point (pinv over pairs)
    wind = np.array([3.0, -1.5, 0.0])
    pts = np.array([[10, 10, 0.5], [70, 20, 0.5], [-40, 90, 0.5], [20, -60, 2.0]])
    tm = timing_model(5, **spec)
    got = expected_ellipses(pts, SQUARE, sound_speed_mps=C, timing=tm, dims=dims,
                            wind_mps=wind)
    for k, p in enumerate(pts):
        cov = crlb_covariance(p, SQUARE, all_pairs(5), tm.pair_covariance_s2(), C, dims=dims,
                              wind_mps=wind)
        ref = ellipse(cov)
        scale = ref["semi_major_m"]
        assert got["semi_major_m"][k] == pytest.approx(ref["semi_major_m"], abs=1e-7 * scale)
        assert got["semi_minor_m"][k] == pytest.approx(ref["semi_minor_m"], abs=1e-7 * scale)
        d_az = (got["azimuth_deg"][k] - ref["azimuth_deg"] + 90) % 180 - 90
        assert abs(d_az) < 1e-5 * DEG
    assert got["locatable"].all()


def test_far_source_ellipse_points_along_its_bearing():
    # common practice: far outside an array the range is what TDOA measures worst, so the
    # major axis lies along the bearing: east of the array 90 deg, north of it 0 deg
    centre = SQUARE[:, :2].mean(axis=0)
    pts = np.array([[*(centre + [400, 0]), 0.0], [*(centre + [0, 400]), 0.0]])
    e = expected_ellipses(pts, SQUARE, sound_speed_mps=C, timing_sd_s=50e-6)
    assert e["azimuth_deg"][0] == pytest.approx(90.0, abs=3 * DEG)
    assert min(e["azimuth_deg"][1], 180 - e["azimuth_deg"][1]) < 3 * DEG
    assert np.all(e["semi_major_m"] > 5 * e["semi_minor_m"])


def test_grid_has_row_per_y_and_marks_what_a_line_array_cannot_locate():
    # three collinear mics on y = 0: on the axis beyond the ends every delay is +-baseline/c
    # whatever the position (textbook geometry), so the information matrix is singular there
    line = np.array([[0, 0, 0.0], [10, 0, 0.0], [25, 0, 0.0]])
    xs = np.linspace(-50, 75, 126)  # 1 m step, includes y = 0 exactly
    ys = np.linspace(-40, 40, 81)
    g = expected_ellipse_grid(line, xs, ys, sound_speed_mps=C, timing_sd_s=50e-6)
    assert g["semi_major_m"].shape == (81, 126)
    row = g["locatable"][40]  # y = 0
    assert not row[(xs < -1) | (xs > 26)].any()
    assert g["locatable"][20].all() and g["locatable"][60].all()  # y = -20 and y = 20
    assert g["max_semi_major_m"] == pytest.approx(125.0 * M)


def test_ellipses_beyond_the_stated_limit_count_as_not_locatable():
    pts = np.array([[20.0, 15.0, 0.0], [2000.0, 15.0, 0.0]])
    e = expected_ellipses(pts, SQUARE, sound_speed_mps=C, timing_sd_s=50e-6,
                          max_semi_major_m=10.0)
    assert e["semi_major_m"][0] < 0.1 * M and e["locatable"][0]
    assert e["semi_major_m"][1] > 10 * M and not e["locatable"][1]


# --------------------------------------------------------------------------- regions, candidates

def test_points_in_polygon_sample_the_inside_only():
    # a 10 m x 10 m square with a 1 m step holds 100 cell centres (geometry)
    sq = np.array([[0, 0], [10, 0], [10, 10], [0, 10.0]])
    pts = points_in_polygon(sq, 1.0, z_m=2.0)
    assert pts.shape == (100, 3) and np.all(pts[:, 2] == 2.0)
    assert pts[:, :2].min() == pytest.approx(0.5 * M) and pts[:, :2].max() == pytest.approx(9.5)
    tri = points_in_polygon([[0, 0], [10, 0], [0, 10]], 1.0)
    assert np.all(tri[:, 0] + tri[:, 1] <= 10 * M)
    # too small for the step: a finer grid is used rather than nothing
    assert len(points_in_polygon(sq * 0.01, 5.0)) > 50


def test_candidate_grid_keeps_away_from_existing_mics():
    pts = candidate_grid((0, 100, 0, 50), step_m=10.0, z_m=1.5, avoid_m=SQUARE)
    d = np.linalg.norm(pts[:, None, :2] - SQUARE[None, :, :2], axis=-1).min(axis=1)
    assert np.all(d >= 10 * M) and np.all(pts[:, 2] == 1.5)
    # 11 x 6 nodes; 4 sit on mics, (20, 40) and (20, 50) are 5 m from the mic at (20, 45)
    assert len(pts) == 11 * 6 - 4 - 2


def _gap_layout():
    # four mics huddled on the west, the area of interest far to the east: an obvious gap
    mics = np.array([[0, 0, 1.5], [10, 2, 1.5], [1, 20, 1.5], [11, 22, 1.5]])
    region = points_in_polygon([[80, -20], [140, -20], [140, 40], [80, 40]], 5.0, z_m=0.0)
    cands = candidate_grid((-40, 160, -60, 80), step_m=10.0, z_m=1.5, avoid_m=mics)
    return mics, region, cands


def test_proposed_mic_fills_the_gap_and_cuts_the_worst_ellipse():
    mics, region, cands = _gap_layout()
    ranked = propose_next_mic(mics, cands, region, sound_speed_mps=C, timing_sd_s=100e-6)
    best = ranked[0]
    assert best.position_m[0] > 60 * M  # on the gap side, east of the array
    assert best.factor > 5.0  # the worst 95 % semi-major over the region drops > 5 x
    assert best.metric_before_m > 3 * M and best.metric_after_m < best.metric_before_m / 5
    # reference: brute force, each candidate appended and the region evaluated afresh
    brute = np.array([region_metric(np.vstack([mics, c]), region, sound_speed_mps=C,
                                    timing_sd_s=100e-6)[1] for c in cands])
    assert brute.min() == pytest.approx(best.metric_after_m, abs=1 * NM)
    np.testing.assert_allclose(cands[np.argmin(brute)], best.position_m)
    assert [p.metric_after_m for p in ranked] == sorted(p.metric_after_m for p in ranked)


def test_greedy_picks_keep_improving_and_the_mean_objective_works():
    mics, region, cands = _gap_layout()
    picks = propose_mics(mics, cands, region, k=3, sound_speed_mps=C, timing_sd_s=100e-6,
                         objective="mean")
    assert len({p.name for p in picks}) == 3
    after = [p.metric_after_m for p in picks]
    assert after[0] < picks[0].metric_before_m and after[1] <= after[0] and after[2] <= after[1]
    for a, b in zip(picks[:-1], picks[1:], strict=True):
        assert b.metric_before_m == pytest.approx(a.metric_after_m, rel=1e-9)
    # with the Carter model the new mic takes the median SNR of the others
    picks_c = propose_mics(mics, cands, region, k=1, sound_speed_mps=C,
                           band_hz=(300.0, 3000.0), snr_db=[0, 6, 6, 12], duration_s=0.2)
    assert picks_c[0].position_m[0] > 60 * M


# --------------------------------------------------------------------------- Monte Carlo check

def _predicted_timing(sims, band, fs, window_s, burst_s):
    """Carter model from the simulated audio: its mean emitted spectrum and the noise level."""
    nfft = 8192
    spec = np.mean([np.abs(sfft.rfft(s.emitted_signals[0], nfft)) ** 2 for s in sims], axis=0)
    f = sfft.rfftfreq(nfft, 1.0 / fs)
    sel = (f >= band[0] - 50) & (f <= band[1] + 50)
    shape = spec / (spec[sel].sum() * (f[1] - f[0]))  # per Hz, unit integral
    sim = sims[0]
    ms = sim.received_rms**2 * burst_s / window_s  # signal power over the analysed window
    noise_psd = sim.noise_rms**2 / (0.5 * fs)  # white noise from 0 to fs/2, one-sided
    snr = np.clip(ms[:, None] * shape[None, sel] / noise_psd[:, None], 1e-9, None)
    return timing_from_spectra(f[sel], snr, window_s)


@pytest.mark.slow  # ~8 s alone, more on a loaded machine
def test_predicted_ellipse_agrees_with_a_monte_carlo_of_the_locator():
    # acceptance (issue 6): the map's 95 % ellipse at 5 test points within 20 % of the scatter
    # of the real locator (simulated audio -> estimate_delays -> locate_source), the timing
    # model predicted from that audio's band and SNR (Carter 1987)
    fs, band, burst, n_trials = 16000.0, (300.0, 3000.0), 0.2, 60
    wf = synth.Waveform("noise", band, burst, 1.0)
    pairs = all_pairs(len(SQUARE))
    max_lag = geometric_max_lag_s(SQUARE, pairs, C)
    rng = np.random.default_rng(20240611)
    points = [[15, 12, 1.0], [35, 25, 1.0], [60, 10, 1.0], [-20, 40, 1.0], [20, -25, 1.0]]
    ratios = []
    for src in points:
        src = np.asarray(src, float)
        fixes, sims = [], []
        for _ in range(n_trials):
            sim = synth.simulate_events(SQUARE, [synth.Emission(src, 0.05, wf)],
                                        sample_rate_hz=fs, duration_s=0.6, sound_speed_mps=C,
                                        snr_db=0.0, rng=rng)
            arr = sim.recorded_arrivals_s[0]
            a, b = int((arr.min() - 0.02) * fs), int((arr.max() + burst + 0.02) * fs)
            d = estimate_delays(sim.signals[:, a:b], fs, max_lag_s=max_lag, band_hz=band)
            fixes.append(locate_source(SQUARE, d, C, dims=2, source_z_m=src[2]).position_m[:2])
            sims.append(sim)
        window = (b - a) / fs
        tm = _predicted_timing(sims, band, fs, window, burst)
        pred = expected_ellipses(src, SQUARE, sound_speed_mps=C, timing=tm)
        mc = ellipse(np.cov(np.array(fixes).T))
        ratios.append(mc["semi_major_m"] / pred["semi_major_m"])
        assert np.linalg.norm(np.mean(fixes, axis=0) - src[:2]) < 0.5 * pred["semi_major_m"]
    assert np.all(np.abs(np.array(ratios) - 1.0) < 0.20), ratios


# --------------------------------------------------------------------------- the site glue

def _gap_site(**raw):
    mics = [[0, 0, 1.5], [10, 2, 1.5], [1, 20, 1.5], [11, 22, 1.5]]
    return _site(mics, receivers=[("Dwelling A", [120.0, 30.0, 1.5]),
                                  ("Dwelling B", [100.0, -10.0, 1.5])], raw=raw)


def test_plan_site_writes_a_plan_result_with_proposals():
    site = _gap_site(candidates=[{"name": "East", "x": 150.0, "y": 10.0},
                                 {"name": "West", "x": -30.0, "y": 10.0, "z": 2.0},
                                 {"name": "North", "x": 5.0, "y": 70.0}],
                     region={"outline": [[80, -20], [140, -20], [140, 40], [80, 40]]})
    res = plan_site(site, timing_sd_s=100e-6, candidates="site", n_propose=2)
    assert res.region_kind == "polygon" and res.candidate_kind == "site"
    assert res.proposals[0].name == "East"
    assert res.proposals[0].factor > 3.0
    assert res.grid_after["semi_major_m"].shape == res.grid["semi_major_m"].shape
    d = res.to_dict()
    text = json.dumps(d, allow_nan=False)  # strict JSON: null where not locatable
    assert d["schema"] == "tdoa-result/1" and d["kind"] == "plan"
    assert d["proposals"][0]["name"] == "East" and d["region"]["kind"] == "polygon"
    assert len(d["grid"]["semi_major_m"]) == len(d["grid"]["y_m"])
    assert {r["name"] for r in d["receivers"]} == {"Dwelling A", "Dwelling B"}
    assert "µs" in d["timing"]["description"] and len(text) < 5_000_000
    # the default candidate heights are the median mic height
    cands = dict(zip(res.candidate_names, res.candidates_m[:, 2], strict=True))
    assert cands["East"] == pytest.approx(1.5) and cands["West"] == pytest.approx(2.0)


def test_plan_site_region_defaults_to_receivers_and_grid_candidates_stay_on_site():
    res = plan_site(_gap_site(), band_hz=(300.0, 3000.0), snr_db=6.0, duration_s=0.2,
                    candidates="auto")
    assert res.region_kind == "receivers" and res.candidate_kind == "grid"
    assert res.candidates_m[:, 0].max() <= 120 + 0.1 * 120 + 1e-9
    assert res.proposals[0].position_m[0] > 40 * M
    only_map = plan_site(_gap_site(), timing_sd_s=1e-4)
    assert only_map.proposals == [] and "proposals" not in only_map.to_dict()


def test_plan_figure_draws_maps_markers_and_the_unlocatable_hatch():
    site = _site([[0, 0, 0.0], [10, 0, 0.0], [25, 0, 0.0]],
                 receivers=[("Lodge", [40.0, 30.0, 0.0])],
                 raw={"candidates": [{"name": "Hill", "x": 10.0, "y": 40.0}]})
    res = plan_site(site, timing_sd_s=50e-6, candidates="site")
    fig = plan_figure(res, site)
    labels = {ax.get_label() for ax in fig.axes}
    assert {"map", "map_after", "colorbar"} <= labels
    gids = {a.get_gid() for ax in fig.axes for a in ax.get_children()}
    assert {"mic:M1", "proposed:Hill", "receiver:Lodge", "unlocatable"} <= gids
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=60)
    assert buf.getvalue()[:8] == b"\x89PNG\r\n\x1a\n"


# --------------------------------------------------------------------------- bad input

def test_too_few_mics_is_a_clear_error():
    with pytest.raises(OptionError, match="at least 3 mics"):
        expected_ellipse_grid(SQUARE[:2], [0, 1], [0, 1], sound_speed_mps=C, timing_sd_s=1e-4)
    with pytest.raises(SiteFileError, match="3-D plan needs at least 4 mics") as e:
        plan_site(_site(SQUARE[:3]), timing_sd_s=1e-4, dims=3)
    assert e.value.field == "mics"


def test_timing_model_needs_exactly_one_way_and_sane_values():
    with pytest.raises(OptionError, match="timing_sd_s"):
        timing_model(4)
    with pytest.raises(OptionError, match="missing duration_s"):
        timing_model(4, band_hz=(100, 1000), snr_db=10)
    with pytest.raises(OptionError, match="not both"):
        timing_model(4, timing_sd_s=1e-4, band_hz=(100, 1000))
    with pytest.raises(OptionError, match="positive"):
        timing_model(4, timing_sd_s=-1e-4)
    with pytest.raises(OptionError, match="lo < hi"):
        timing_model(4, band_hz=(1000, 100), snr_db=10, duration_s=1)
    with pytest.raises(OptionError, match="duration"):
        timing_model(4, band_hz=(100, 1000), snr_db=10, duration_s=0)
    with pytest.raises(OptionError, match="one per mic"):
        timing_model(4, timing_sd_s=[1e-4, 2e-4])


def test_region_without_points_is_a_clear_error():
    mics, _region, cands = _gap_layout()
    with pytest.raises(OptionError, match="region of interest holds no points"):
        propose_next_mic(mics, cands, np.zeros((0, 3)), sound_speed_mps=C, timing_sd_s=1e-4)
    with pytest.raises(OptionError, match="encloses no area"):
        points_in_polygon([[0, 0], [5, 5], [10, 10]])
    with pytest.raises(OptionError, match="at least 3"):
        points_in_polygon([[0, 0], [5, 5]])
    site = _site(SQUARE)
    with pytest.raises(SiteFileError, match="no \\[\\[receivers\\]\\]"):
        plan_site(site, timing_sd_s=1e-4, candidates="grid", region="receivers")
    with pytest.raises(SiteFileError, match="no \\[region\\] outline"):
        plan_site(site, timing_sd_s=1e-4, candidates="grid", region="polygon")
    bad = _site(SQUARE, raw={"region": {"outline": [[0, 0], [1, 1]]}})
    with pytest.raises(SiteFileError, match="at least 3") as e:
        plan_site(bad, timing_sd_s=1e-4, candidates="grid")
    assert e.value.field == "region.outline"


def test_bad_candidates_are_clear_errors():
    mics, region, cands = _gap_layout()
    with pytest.raises(SiteFileError, match="no \\[\\[candidates\\]\\]"):
        plan_site(_site(SQUARE), timing_sd_s=1e-4, candidates="site")
    site = _site(SQUARE, raw={"candidates": [{"x": 1.0, "y": 2.0}, {"x": 3.0}]})
    with pytest.raises(SiteFileError, match="must be a number") as e:
        plan_site(site, timing_sd_s=1e-4, candidates="site")
    assert e.value.field == "candidates[1].y"
    site = _site(SQUARE, raw={"candidates": [{"x": 1.0, "y": 2.0, "height": 3.0}]})
    with pytest.raises(SiteFileError, match='unknown key "height"'):
        plan_site(site, timing_sd_s=1e-4, candidates="site")
    with pytest.raises(OptionError, match="no candidate"):
        propose_next_mic(mics, np.zeros((0, 3)), region, sound_speed_mps=C, timing_sd_s=1e-4)
    with pytest.raises(OptionError, match="asked for 9"):
        propose_mics(mics, cands[:4], region, k=9, sound_speed_mps=C, timing_sd_s=1e-4)
    with pytest.raises(OptionError, match='"worst" or "mean"'):
        propose_next_mic(mics, cands, region, sound_speed_mps=C, timing_sd_s=1e-4,
                         objective="median")
    with pytest.raises(OptionError, match='"site", "grid" or "auto"'):
        plan_site(_site(SQUARE), timing_sd_s=1e-4, candidates="everywhere")


def test_oversized_grid_is_refused():
    xs = np.linspace(0, 1000, 2001)
    with pytest.raises(OptionError, match="too large"):
        expected_ellipse_grid(SQUARE, xs, xs, sound_speed_mps=C, timing_sd_s=1e-4)


def test_declared_survey_uncertainty_widens_the_map_as_a_monte_carlo_of_the_locator(tmp_path):
    # Mics surveyed to 5 cm per axis ([survey] position_sd_m): the true mics stand off their
    # nominal positions by N(0, 5 cm); the locator, given the nominal ones, scatters by more
    # than the timing alone explains.  Reference: Monte Carlo of locate_source on exact delays
    # from the true mics (+2 us timing noise per mic), 400 trials; the plan's first-order map
    # (JCGM 100:2008 propagation, as the fix's budget) within 20 % of the scatter.
    from locate.accuracy.plan_site import declared_arrival_cov_s2
    from locate.io.site import load_site
    from locate.io.toml import dump_toml
    from locate.physics.air import travel_time_s
    from locate.signal.delays import DelaySet

    doc = {"air": {"temperature_c": 20.0, "relative_humidity": 50.0, "sound_speed_mps": C},
           "survey": {"position_sd_m": 0.05},
           "mics": [{"name": f"M{k + 1}", "x": float(x), "y": float(y), "z": float(z)}
                    for k, (x, y, z) in enumerate(SQUARE)]}
    path = tmp_path / "survey.toml"
    path.write_text(dump_toml(doc))
    site = load_site(path, require_audio=False)
    src = np.array([110.0, 70.0, 0.0])
    tm = timing_model(len(SQUARE), timing_sd_s=2 * US)
    planned = tm.with_declared(declared_arrival_cov_s2(site, C))
    assert "declared survey/clock uncertainty" in planned.describe()
    grid = [np.array([src[0], src[0] + 1.0]), np.array([src[1], src[1] + 1.0])]
    bare = expected_ellipse_grid(SQUARE, *grid, sound_speed_mps=C, timing=tm)
    pred = expected_ellipse_grid(SQUARE, *grid, sound_speed_mps=C, timing=planned)
    pred_major = float(pred["semi_major_m"][0, 0])
    assert pred_major > 3.0 * float(bare["semi_major_m"][0, 0])
    rng = np.random.default_rng(12)
    pairs = all_pairs(len(SQUARE))
    a = incidence_matrix(pairs, len(SQUARE))
    cov = (2 * US) ** 2 * a @ a.T
    errs = []
    for _ in range(400):
        true_mics = SQUARE + rng.normal(0.0, 0.05, SQUARE.shape)
        t = travel_time_s(src, true_mics, C) + rng.normal(0.0, 2 * US, len(SQUARE))
        ds = DelaySet(pairs=pairs, delay_s=t[pairs[:, 1]] - t[pairs[:, 0]],
                      sd_s=np.sqrt(np.diag(cov)), covariance_s2=cov, peak=np.ones(len(pairs)),
                      score=np.full(len(pairs), 100.0), second_ratio=np.zeros(len(pairs)),
                      quality=("good",) * len(pairs), t_s=0.0, duration_s=1.0,
                      band_hz=(100.0, 4000.0), sample_rate_hz=48000.0,
                      max_lag_s=np.full(len(pairs), 0.3))
        fx = locate_source(SQUARE, ds, C, reject=False)
        errs.append(fx.position_m[:2] - src[:2])
    scatter = ellipse(np.pad(np.cov(np.array(errs).T), ((0, 1), (0, 1))), 0.95)
    assert pred_major == pytest.approx(scatter["semi_major_m"], rel=0.2)
