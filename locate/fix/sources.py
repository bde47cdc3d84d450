"""Several sources in one span: where the sound comes from, band by band.

A span of a site where two plants run holds both; one set of pair delays (one correlation
peak per pair) can only describe one of them.  Here the span is searched for every source that
stands out:

1. **Spectral lines** - tonal sounds (a hum and its harmonics) live in narrow lines of the
   averaged power spectrum; bins standing :data:`LINE_DB` above the running median of the
   spectrum (Welch average over the mics, common practice for tonal detection) are analysed
   apart from the rest, so that a hum under a broadband fan is not drowned by the fan's many
   bins.  The lines of all harmonics are used jointly.
2. **Steered response power with the phase transform** (SRP-PHAT; DiBiase, Silverman &
   Brandstein 2001, "Robust localization in reverberant rooms", in Microphone Arrays,
   Springer, ch. 8): for each band (the tonal lines, then each octave of the rest) the
   cross-spectra of all pairs are whitened to unit magnitude and the pair correlations summed
   at the delays each point of a grid over the site would give.  All pairs at once decide
   between the periodic peaks of a tonal sound where the geometry allows.  The map is taken on
   the Hilbert envelope of each correlation with a maximum over the delays a grid cell spans
   (so a coarse grid misses no sharp peak), then refined on a finer grid around each peak.
3. **Peaks** - local maxima standing :data:`PEAK_SIGMAS` robust deviations above the band's
   map and at least :data:`PEAK_RATIO` of the band's highest; peaks of several bands within
   :data:`MERGE_M` of each other are one source, kept with the bands that show it.

The caller measures each source's own delays (its band, a search window around the delays
of its peak) and fixes it by weighted least squares (:mod:`locate.fix.solver`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

from locate.fix.solver import predict_delays

__all__ = ["SourcePeak", "BandMap", "spectral_lines", "analysis_bands", "srp_maps",
           "find_sources", "site_grid", "LINE_DB", "PEAK_SIGMAS", "PEAK_RATIO", "MERGE_M"]

LINE_DB = 10.0
"""A bin this far above the running median of the averaged spectrum belongs to a line."""

PEAK_SIGMAS = 10.0
"""A map peak must stand this many standard deviations of an incoherent map above the map's
median: a pair's PHAT correlation over K independent bins of random phase has variance
1 / (2K) (each bin adds cos of a uniform phase), the mean over P pairs 1 / (2KP)."""

SADDLE = 0.5
"""A second peak is a separate source only if the map dips between it and every stronger one
below this fraction of its own height above the median (its prominence; a ridge of a far
source, whose range is poorly known, is one source)."""

PEAK_RATIO = 0.3
"""...and reach this fraction of the band's highest value above the median."""

MERGE_M = 6.0
"""Peaks of different bands closer than this are one source."""

OCTAVE_CENTRES_HZ = (63.0, 125.0, 250.0, 500.0, 1000.0, 2000.0, 4000.0, 8000.0)


@dataclass
class BandMap:
    """SRP-PHAT map of one band over a grid."""

    label: str
    band_hz: tuple
    x_m: np.ndarray
    y_m: np.ndarray
    power: np.ndarray  # (len(y), len(x)), mean pair correlation envelope
    floor: float
    spread: float
    tonal: bool = False
    sigma: float = 0.0  # standard deviation of an incoherent map (PEAK_SIGMAS)
    candidates: list = field(default_factory=list)
    zoom: tuple | None = None  # (x, y, power) of every line's correlation near a tonal source

    def value_at(self, xy):
        """The map's height above its median at the grid point nearest ``xy``."""
        ix = int(np.clip(np.rint((xy[0] - self.x_m[0]) / (self.x_m[1] - self.x_m[0])), 0,
                         len(self.x_m) - 1))
        iy = int(np.clip(np.rint((xy[1] - self.y_m[0]) / (self.y_m[1] - self.y_m[0])), 0,
                         len(self.y_m) - 1))
        return float(self.power[iy, ix] - self.floor)


@dataclass
class SourcePeak:
    """One source found on the maps."""

    position_m: np.ndarray  # (3,)
    strength: float  # height above the floor in robust deviations (best band)
    bands: list = field(default_factory=list)  # labels of the bands that show it
    band_hz: tuple = (0.0, 0.0)
    tonal: bool = False
    candidates: list = field(default_factory=list)  # other near-equal maxima (tonal)
    height: float = 0.0  # height above the band map's median (map units)


def _bin_lines(freqs, power, band_mask, width_hz=25.0):
    """Bool mask of line bins of an averaged spectrum (see LINE_DB)."""
    df = freqs[1] - freqs[0]
    w = max(int(round(width_hz / df)) | 1, 5)
    med = ndimage.median_filter(power, size=w, mode="nearest")
    return band_mask & (power > med * 10 ** (LINE_DB / 10))


def spectral_lines(signals, sample_rate_hz, *, band_hz=None, segment_s=0.5):
    """Frequencies (Hz) of the spectral lines of a span (Welch average over mics)."""
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    n = min(int(segment_s * fs), x.shape[1])
    hop = max(n // 2, 1)
    win = np.hanning(n)
    acc = np.zeros(n // 2 + 1)
    count = 0
    for s in range(0, x.shape[1] - n + 1, hop):
        sp = sfft.rfft(x[:, s:s + n] * win, axis=-1)
        acc += np.mean(np.abs(sp) ** 2, axis=0)
        count += 1
    freqs = sfft.rfftfreq(n, 1 / fs)
    lo, hi = (40.0, 0.45 * fs) if band_hz is None else band_hz
    if count < 2:
        return np.zeros(0)
    lines = _bin_lines(freqs, acc / count, (freqs >= lo) & (freqs <= hi))
    # one frequency per run of line bins: the power-weighted centre
    lab, k = ndimage.label(lines)
    if k == 0:
        return np.zeros(0)
    p = acc / count
    return np.array(ndimage.sum(freqs * p, lab, range(1, k + 1))
                    / ndimage.sum(p, lab, range(1, k + 1)))


def analysis_bands(sample_rate_hz, line_freqs_hz=(), *, band_hz=None):
    """``[(label, (lo, hi), tonal)]``: the tonal lines (if any), then the octave bands."""
    fs = float(sample_rate_hz)
    lo_all, hi_all = (40.0, 0.45 * fs) if band_hz is None else band_hz
    out = []
    lines = np.asarray(line_freqs_hz, float)
    if lines.size:
        out.append(("tonal lines", (float(lines.min()), float(lines.max())), True))
    for fc in OCTAVE_CENTRES_HZ:
        lo, hi = fc / np.sqrt(2), fc * np.sqrt(2)
        lo, hi = max(lo, lo_all), min(hi, hi_all)
        if hi - lo < 0.25 * fc:
            continue
        out.append((f"{fc:g} Hz octave", (float(lo), float(hi)), False))
    return out


def site_grid(mic_positions_m, *, extent_m=None, n=161):
    """A square grid (x, y) around the mics: 3 apertures either side of their centre, at
    least 60 m."""
    pos = np.asarray(mic_positions_m, float)
    centre = pos[:, :2].mean(axis=0)
    ap = float(np.max(np.linalg.norm(pos[:, None, :2] - pos[None, :, :2], axis=-1)))
    half = max(3.0 * ap, 60.0) if extent_m is None else float(extent_m)
    x = np.linspace(centre[0] - half, centre[0] + half, n)
    y = np.linspace(centre[1] - half, centre[1] + half, n)
    return x, y


class _Spectra:
    """Whitened cross-spectra of all pairs of a span, and the line mask."""

    def __init__(self, signals, fs, pairs, line_freqs_hz, line_width_hz):
        x = np.asarray(signals, float)
        x = x - x.mean(axis=1, keepdims=True)
        # Hann taper: a line's sidelobes fall as 1/k^3 instead of 1/k (a strong hum would
        # otherwise leak into every bin of the octave bands, PHAT weighting them all alike)
        x = x * np.hanning(x.shape[1] + 2)[1:-1]
        self.fs = float(fs)
        self.n = x.shape[1]
        self.nfft = sfft.next_fast_len(2 * self.n, real=True)
        self.freqs = sfft.rfftfreq(self.nfft, 1 / self.fs)
        spec = sfft.rfft(x, self.nfft, axis=-1)
        self.pairs = np.asarray(pairs, int)
        self.duration_s = self.n / self.fs
        g = np.conj(spec[self.pairs[:, 0]]) * spec[self.pairs[:, 1]]
        self.unit = g / np.maximum(np.abs(g), 1e-300)
        lines = np.zeros(self.freqs.size, bool)
        near = np.zeros(self.freqs.size, bool)
        for f0 in np.asarray(line_freqs_hz, float):
            lines |= np.abs(self.freqs - f0) <= line_width_hz
            near |= np.abs(self.freqs - f0) <= line_guard_hz(self.duration_s)
        self.lines = lines  # the lines' main lobes: the tonal band
        self.near = near  # ...and their leakage: left out of the broadband bands

    def envelope(self, band_hz, tonal, exclude_lines):
        """Hilbert envelope of each pair's band-limited PHAT correlation, (P, nfft), lags
        circular, normalised so that one coherent source gives 1."""
        lo, hi = band_hz
        m = (self.freqs >= lo) & (self.freqs <= hi)
        m = m & self.lines if tonal else (m & ~self.near if exclude_lines else m)
        k = int(m.sum())
        if k < 4:
            return None
        full = np.zeros((len(self.pairs), self.nfft), complex)
        idx = np.flatnonzero(m)
        full[:, idx] = self.unit[:, idx]
        # analytic signal of the correlation: one-sided spectrum, complex inverse transform
        return np.abs(np.fft.ifft(full, axis=-1)) * self.nfft / k

    def correlation(self, band_hz, tonal, exclude_lines):
        """The band-limited PHAT correlation itself (real), (P, nfft)."""
        lo, hi = band_hz
        m = (self.freqs >= lo) & (self.freqs <= hi)
        m = m & self.lines if tonal else (m & ~self.near if exclude_lines else m)
        k = int(m.sum())
        if k < 4:
            return None
        return sfft.irfft(np.where(m, self.unit, 0.0), self.nfft, axis=-1) * self.nfft / (2 * k)


def line_width_hz(duration_s):
    """Half-width of a line in the spectrum of a span: the Hann main lobe, 2 / duration, plus
    a quarter bin."""
    return 2.25 / max(float(duration_s), 1e-3)


def line_guard_hz(duration_s):
    """Half-width left out around a line in the broadband bands: the Hann window's sidelobes
    fall as 1 / k^3 in bins of 1 / duration (textbook), below -60 dB from about 6 bins; at
    least 1 Hz."""
    return max(1.0, 6.0 / max(float(duration_s), 1e-3))


def remove_lines(signals, sample_rate_hz, lines_hz):
    """The signals with each line's sinusoid (frequency refined, amplitude and phase per mic
    by least squares) subtracted: the broadband rest without the hum's leakage."""
    x = np.array(signals, dtype=float)
    fs = float(sample_rate_hz)
    n = x.shape[1]
    t = np.arange(n) / fs
    win = np.hanning(n + 2)[1:-1]
    nfft = sfft.next_fast_len(8 * n, real=True)
    spec = np.mean(np.abs(sfft.rfft(x * win, nfft, axis=-1)) ** 2, axis=0)
    freqs = sfft.rfftfreq(nfft, 1 / fs)
    for f0 in np.asarray(lines_hz, float):
        near = np.flatnonzero(np.abs(freqs - f0) <= 2.0 / (n / fs))
        if near.size < 3:
            continue
        k = near[int(np.argmax(spec[near]))]
        if 0 < k < len(spec) - 1:  # parabolic peak on the log spectrum
            y0, y1, y2 = np.log(spec[k - 1:k + 2] + 1e-300)
            den = y0 - 2 * y1 + y2
            frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
        else:
            frac = 0.0
        f = freqs[k] + frac * (freqs[1] - freqs[0])
        basis = np.stack([np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t)])  # (2, n)
        coef = np.linalg.lstsq(basis.T, x.T, rcond=None)[0]  # (2, N)
        x -= (basis.T @ coef).T
    return x


def _bins(spectra, band, tonal):
    lo, hi = band
    m = (spectra.freqs >= lo) & (spectra.freqs <= hi)
    return int(np.sum(m & spectra.lines if tonal else m & ~spectra.near))


def _saddle_separated(bm, a_xy, b_xy, height_b):
    """Does the map dip between a and b below SADDLE x b's height above the median?"""
    t = np.linspace(0.0, 1.0, 60)
    xs = a_xy[0] + t * (b_xy[0] - a_xy[0])
    ys = a_xy[1] + t * (b_xy[1] - a_xy[1])
    ix = np.clip(np.rint((xs - bm.x_m[0]) / (bm.x_m[1] - bm.x_m[0])).astype(int), 0,
                 len(bm.x_m) - 1)
    iy = np.clip(np.rint((ys - bm.y_m[0]) / (bm.y_m[1] - bm.y_m[0])).astype(int), 0,
                 len(bm.y_m) - 1)
    return float(np.min(bm.power[iy, ix]) - bm.floor) < SADDLE * height_b


def _lookup(curves, delays_s, fs, blur_samples):
    """Mean over pairs of each pair's curve at the given delays (nearest sample), after a
    running maximum over +-blur_samples.  ``delays_s`` (G, P)."""
    n = curves.shape[1]
    if blur_samples >= 1:
        curves = ndimage.maximum_filter1d(curves, size=2 * int(blur_samples) + 1, axis=1,
                                          mode="wrap")
    k = np.rint(delays_s * fs).astype(np.int64) % n
    vals = np.take_along_axis(curves, k.T, axis=1)  # (P, G)
    return vals.mean(axis=0)


def srp_maps(signals, sample_rate_hz, mic_positions_m, pairs, sound_speed_mps, *, x_m, y_m,
             z_m, wind_mps=None, band_hz=None, line_freqs_hz=None):
    """SRP-PHAT maps of a span over the grid ``x_m`` x ``y_m`` at height ``z_m``.

    Returns
    -------
    maps : list of BandMap
    spectra : _Spectra
        Kept for refining peaks (:func:`find_sources`).
    """
    fs = float(sample_rate_hz)
    if line_freqs_hz is None:
        line_freqs_hz = spectral_lines(signals, fs, band_hz=band_hz)
    n_samp = np.asarray(signals).shape[1]
    spectra = _Spectra(signals, fs, pairs, line_freqs_hz, line_width_hz=line_width_hz(n_samp / fs))
    gx, gy = np.meshgrid(x_m, y_m)
    pts = np.stack([gx.ravel(), gy.ravel(), np.full(gx.size, float(z_m))], axis=-1)
    tau = predict_delays(pts, mic_positions_m, pairs, sound_speed_mps, wind_mps)
    step = max(float(np.diff(x_m[:2])[0]) if len(x_m) > 1 else 1.0, 1e-3)
    blur = 2.0 * step * np.sqrt(0.5) / sound_speed_mps * fs  # delay change over half a cell
    maps = []
    for label, band, tonal in analysis_bands(fs, line_freqs_hz, band_hz=band_hz):
        if tonal:
            bm = _tonal_map(spectra, line_freqs_hz, mic_positions_m, pairs, sound_speed_mps,
                            x_m, y_m, z_m, wind_mps, label)
            if bm is not None:
                maps.append(bm)
            continue
        env = spectra.envelope(band, tonal, exclude_lines=True)
        if env is None:
            continue
        power = _lookup(env, tau, fs, blur).reshape(gx.shape)
        med = float(np.median(power))
        mad = float(np.median(np.abs(power - med)) * 1.4826)
        k_ind = _bins(spectra, band, tonal) / 2.0  # zero padding to 2n: 2 bins per cell
        sigma = 1.0 / np.sqrt(2.0 * max(k_ind, 1.0) * len(pairs))
        maps.append(BandMap(label, band, np.asarray(x_m), np.asarray(y_m), power, med,
                            max(mad, 1e-9), tonal, sigma))
    return maps, spectra


MAX_TONAL_POINTS = 1_000_000  # grid points of the tonal map


def _tonal_map(spectra, lines, mic_positions_m, pairs, c, x_m, y_m, z_m, wind, label):
    """The map of the lowest lines (up to 2.5x the lowest) on a grid of an eighth of their
    shortest wavelength: the correlation itself, not its envelope (a harmonic series has a
    periodic envelope too)."""
    lines = np.sort(np.asarray(lines, float))
    low = lines[lines <= 2.5 * lines[0]]
    band = (float(low[0]) - 1.0, float(low[-1]) + 1.0)
    curves = spectra.correlation(band, True, True)
    if curves is None:
        return None
    span = max(x_m[-1] - x_m[0], y_m[-1] - y_m[0])
    step = max(c / (8.0 * low[-1]), span / np.sqrt(MAX_TONAL_POINTS))
    x = np.arange(x_m[0], x_m[-1] + step / 2, step)
    y = np.arange(y_m[0], y_m[-1] + step / 2, step)
    power = np.empty((len(y), len(x)))
    for r in range(len(y)):  # row by row: bounded memory
        pts = np.stack([x, np.full_like(x, y[r]), np.full_like(x, float(z_m))], axis=-1)
        power[r] = _lookup(curves, predict_delays(pts, mic_positions_m, pairs, c, wind),
                           spectra.fs, 0.0)
    med = float(np.median(power))
    mad = float(np.median(np.abs(power - med)) * 1.4826)
    sigma = 1.0 / np.sqrt(2.0 * max(_bins(spectra, band, True) / 2.0, 1.0) * len(pairs))
    return BandMap(label, (float(lines[0]), float(lines[-1])), x, y, power, med, max(mad, 1e-9),
                   True, sigma)


def _refine(spectra, band, tonal, centre_xy, half_m, mic_positions_m, pairs, c, z_m, wind,
            n=41, envelope=True):
    x = np.linspace(centre_xy[0] - half_m, centre_xy[0] + half_m, n)
    y = np.linspace(centre_xy[1] - half_m, centre_xy[1] + half_m, n)
    gx, gy = np.meshgrid(x, y)
    pts = np.stack([gx.ravel(), gy.ravel(), np.full(gx.size, float(z_m))], axis=-1)
    tau = predict_delays(pts, mic_positions_m, pairs, c, wind)
    curves = (spectra.envelope(band, tonal, True) if envelope
              else spectra.correlation(band, tonal, True))
    step = x[1] - x[0]
    blur = 2.0 * step * np.sqrt(0.5) / c * spectra.fs if envelope else 0.0
    vals = _lookup(curves, tau, spectra.fs, blur).reshape(gx.shape)
    return gx, gy, vals


MAX_TONAL_CANDIDATES = 300


def _best_tonal(bm, spectra, mics, pairs, c, z_m, wind):
    """The tonal map's maxima (within 70 % of the highest) re-scored with every line: the best,
    and the others within 90 % of it (distinct by over 1 m) as candidate positions."""
    p = bm.power
    loc = p == ndimage.maximum_filter(p, size=3, mode="nearest")
    top = p.max() - bm.floor
    iy, ix = np.nonzero(loc & (p - bm.floor >= 0.7 * top))
    order = np.argsort(-p[iy, ix])[:MAX_TONAL_CANDIDATES]
    step = float(np.diff(bm.x_m[:2])[0])
    scored = []
    for k in order:
        gx, gy, vals = _refine(spectra, bm.band_hz, True, (bm.x_m[ix[k]], bm.y_m[iy[k]]),
                               step, mics, pairs, c, z_m, wind, n=13, envelope=False)
        j = int(np.argmax(vals))
        scored.append((float(vals.ravel()[j]), float(gx.ravel()[j]), float(gy.ravel()[j])))
    scored.sort(key=lambda t: -t[0])
    best = scored[0]
    # polish the best on a finer grid
    gx, gy, vals = _refine(spectra, bm.band_hz, True, best[1:], step / 6, mics, pairs, c, z_m,
                           wind, n=13, envelope=False)
    vals = vals
    j = int(np.argmax(vals))
    xy = (float(gx.ravel()[j]), float(gy.ravel()[j]))
    cands = []
    for v, x, y in scored[1:]:
        if v >= 0.9 * best[0] and np.hypot(x - xy[0], y - xy[1]) > 1.0 and all(
                np.hypot(x - a, y - b) > 1.0 for a, b in cands):
            cands.append((x, y))
    return xy, cands, float(np.max(vals))


def find_sources(maps, spectra, mic_positions_m, pairs, sound_speed_mps, *, z_m,
                 wind_mps=None, max_sources=None):
    """Sources standing out of the maps, strongest first (module notes, steps 3).

    Returns
    -------
    list of SourcePeak
    """
    found = []  # (height above the median, xy, map)
    for bm in maps:
        p = bm.power
        excess = p - bm.floor
        top = float(excess.max())
        if top <= 0:
            continue
        if bm.tonal and spectra.correlation(bm.band_hz, True, True) is None:
            continue  # too few line bins in this span to correlate (a line too narrow)
        if bm.tonal:  # one tonal source: the best of the maxima once all lines are used
            xy, cands, best = _best_tonal(bm, spectra, mic_positions_m, pairs, sound_speed_mps,
                                          z_m, wind_mps)
            all_lines = (0.0, spectra.freqs[-1])
            sigma = 1.0 / np.sqrt(2.0 * max(_bins(spectra, all_lines, True) / 2.0, 1.0)
                                  * len(pairs))
            if best >= PEAK_SIGMAS * sigma:
                found.append((top, xy, bm))
                bm.candidates = cands
                gx, gy, vals = _refine(spectra, bm.band_hz, True, xy, 5.0, mic_positions_m,
                                       pairs, sound_speed_mps, z_m, wind_mps, n=201,
                                       envelope=False)
                bm.zoom = (gx[0], gy[:, 0], vals)
            continue
        loc = (p == ndimage.maximum_filter(p, size=5, mode="nearest"))
        loc[:2, :] = loc[-2:, :] = False  # a maximum on the grid's edge is not a peak
        loc[:, :2] = loc[:, -2:] = False
        ok = loc & (excess >= PEAK_SIGMAS * bm.sigma) & (excess >= PEAK_RATIO * top)
        for iy, ix in zip(*np.nonzero(ok)):
            found.append((float(excess[iy, ix]), (bm.x_m[ix], bm.y_m[iy]), bm))
    found.sort(key=lambda t: -t[0])
    sources: list[SourcePeak] = []
    for height, xy, bm in found:
        xy = np.asarray(xy, float)
        cell = 2.0 * float(np.diff(bm.x_m[:2])[0])
        same = [s for s in sources
                if np.hypot(*(xy - s.position_m[:2])) < MERGE_M + cell
                or (not bm.tonal and not _saddle_separated(bm, s.position_m[:2], xy, height))]
        if same:
            s = same[0]
            if bm.label not in s.bands and np.hypot(*(xy - s.position_m[:2])) < MERGE_M + cell:
                s.bands.append(bm.label)
                s.band_hz = (min(s.band_hz[0], bm.band_hz[0]), max(s.band_hz[1], bm.band_hz[1]))
            continue
        sources.append(SourcePeak(np.array([xy[0], xy[1], z_m], float),
                                  height / max(bm.sigma, 1e-12), [bm.label], tuple(bm.band_hz),
                                  bm.tonal, height=height))
    # refine each source in its strongest band: the envelope on a finer grid, then the
    # correlation itself (all pairs jointly pick one of a tonal sound's periodic maxima)
    label_map = {bm.label: bm for bm in maps}
    for s in sources:
        bm = label_map[s.bands[0]]
        step = float(np.diff(bm.x_m[:2])[0])
        centre = s.position_m[:2]
        if not bm.tonal:
            gx, gy, vals = _refine(spectra, bm.band_hz, bm.tonal, centre, 2.0 * step,
                                   mic_positions_m, pairs, sound_speed_mps, z_m, wind_mps)
            k = int(np.argmax(vals))
            centre = np.array([gx.ravel()[k], gy.ravel()[k]])
        if not bm.tonal:
            gx, gy, vals = _refine(spectra, bm.band_hz, False, centre, 1.0, mic_positions_m,
                                   pairs, sound_speed_mps, z_m, wind_mps, n=81, envelope=False)
            k = int(np.argmax(vals))
            centre = np.array([gx.ravel()[k], gy.ravel()[k]])
        if bm.tonal:
            s.candidates = list(bm.candidates)
        s.position_m = np.array([centre[0], centre[1], z_m], float)
    if max_sources is not None:
        sources = sources[:max_sources]
    return sources
