"""The per-chunk work of :func:`locate.signal.windowed.estimate_delays_windows`.

The steps of :func:`locate.signal.delays.estimate_delays` for a chunk of windows at once, on the
band
bins of their spectra.  Quantities that are smoothed over frequency anyway (the Daniell
coherence over ``width`` bins, the Hannan-Thomson weights, the integrands of the delay
covariance) are evaluated on a grid of every ``q``-th bin and interpolated linearly where a
per-bin value is needed; ``q = 1`` reproduces ``estimate_delays`` bin for bin.  Phases (the
cross-spectra, the fine-delay sums) always stay at full resolution.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import fft as sfft
from scipy.ndimage import uniform_filter1d

from locate.signal.delays import (
    AMBIGUOUS_RATIO,
    VARIANCE_MARGIN,
    WEAK_PEAK_SCORE,
    binned_weights,
    coherent_band,
    delay_covariance,
    newton_delays,
)
from locate.signal.window_peaks import coarse_peaks

__all__ = ["chunk_delays"]

_TINY = 1e-300
_TINY32 = 1e-30  # floor for single-precision spectra (normalised to a peak of 1)


def _linear_phase(omega, lag_s):
    """exp(i omega lag) for lags (...,) and equally spaced bins (K,): shape (..., K).

    Built from two small tables (bins ``a * step`` and offsets ``b``) and one product.
    """
    k = omega.size
    step = max(int(np.sqrt(k)), 1)
    n_hi = -(-k // step)
    lag = np.asarray(lag_s)[..., None]
    lo = np.exp(1j * (omega[:step] - omega[0]) * lag)  # (..., step)
    hi = np.exp(1j * omega[step * np.arange(n_hi)] * lag)  # (..., n_hi)
    out = (hi[..., :, None] * lo[..., None, :]).reshape(lag.shape[:-1] + (n_hi * step,))
    return out[..., :k]


def _inverse(spec_band, factor, g, workers):
    """Correlation on the lag grid of ``spec_band * factor`` (..., Ks), shape (..., L).

    Single precision: the correlation only places the coarse peak and its quality measures.
    """
    full = np.zeros(spec_band.shape[:-1] + (g.m // 2 + 1,), dtype=np.complex64)
    k = g.k_inv - g.s0
    np.multiply(spec_band[..., :k], factor[..., :k], out=full[..., g.s0:g.k_inv],
                casting="same_kind")
    r = sfft.irfft(full, g.m, axis=-1, workers=workers)
    big = int(g.lags[-1])
    return np.concatenate([r[..., g.m - big:], r[..., : big + 1]], axis=-1)  # lags -big..big


def _box_means(a, g):
    """Mean of ``a`` (..., Ks) over the smoothing box of every bin: (..., Ks).

    The box is ``g.width`` bins (as :func:`locate.signal.delays._smooth`); at the ends of the
    spectrum
    it holds the bins that exist.
    """
    ks = a.shape[-1]
    cs = np.zeros(a.shape[:-1] + (ks + 1,), dtype=a.dtype)
    np.cumsum(a, axis=-1, out=cs[..., 1:])
    out = np.empty_like(a)
    i0, i1 = g.box_full  # bins whose box lies inside the slice: contiguous differences
    out[..., i0:i1] = (cs[..., i0 + g.box_hi[i0] - i0:i1 + g.box_hi[i0] - i0]
                       - cs[..., g.box_lo[i0]:g.box_lo[i0] + i1 - i0]) / g.width
    edge = np.r_[0:i0, i1:ks]
    out[..., edge] = (cs[..., g.box_hi[edge]] - cs[..., g.box_lo[edge]]) / g.box_n[edge]
    return out


def _smoothed(a, g):
    """Moving mean over ``g.width`` bins: exact box sums, or (single precision, band with
    margins on both sides) scipy's running mean, which accumulates in double precision."""
    if not g.single:
        return _box_means(a, g)
    if np.iscomplexobj(a):
        out = np.empty(a.shape, np.complex64)
        uniform_filter1d(a.real, g.width, axis=-1, output=out.real)
        uniform_filter1d(a.imag, g.width, axis=-1, output=out.imag)
        return out
    return uniform_filter1d(a, g.width, axis=-1)


def _interp(vq, g):
    """Linear interpolation from the grid bins (..., Kq) to every band bin (..., Ks)."""
    if g.q == 1:
        return vq
    a = vq[..., g.ij]
    return a + (vq[..., g.ij + 1] - a) * g.frac


def _coherence(s_cross_q, s_auto_i, s_auto_j, g):
    denom = np.maximum(s_auto_i * s_auto_j, _TINY32 if g.single else _TINY)
    coh = (s_cross_q.real**2 + s_cross_q.imag**2) / denom
    return np.clip((g.dof * coh - 1.0) / (g.dof - 1.0), 0.0, 0.9999)  # bias correction


def _median_over_pairs(coh, good):
    """Median over pairs (axis 1) of ``coh`` (C, P, K) using pairs ``good`` (C, P) only."""
    use = np.where(good.any(axis=1, keepdims=True), good, True)
    n_p = coh.shape[1]
    if use.all():
        mid = sorted({(n_p - 1) // 2, n_p // 2})
        part = np.partition(np.swapaxes(coh, 1, 2), mid, axis=-1)
        return 0.5 * (part[..., (n_p - 1) // 2] + part[..., n_p // 2])
    return np.nanmedian(np.where(use[:, :, None], coh, np.nan), axis=1)


def _fine_delays(a, omega, limit_s, taylor_s=None):
    """Newton maximisation of Re sum_k a_k exp(i omega_k d) over |d| <= limit: shape (...).

    With omega_k = omega_c + delta_k (omega_c the middle of the bins), the slope and curvature
    sums sum_k a_k omega_k^m exp(i omega_k d), m = 1, 2, are exp(i omega_c d) times
    combinations of T_j = sum_k a_k delta_k^j exp(i delta_k d), and these come from the Taylor
    moments mu_n = sum_k a_k (delta_k / delta_max)^n (one single-precision matrix product)
    summed by Horner's rule, the series cut where its remainder is below 1e-17 for
    |d| <= ``taylor_s``.  The rare curves whose steps leave that radius are redone with the
    exact sums.
    """
    lead = a.shape[:-1]
    if omega.size == 0:
        return np.zeros(lead)
    taylor_s = limit_s if taylor_s is None else min(taylor_s, limit_s)
    om_c = 0.5 * float(omega.max() + omega.min())
    delta = omega - om_c
    ds = max(float(np.abs(delta).max()), 1e-12)
    umax = ds * taylor_s
    n_terms = 6
    while umax ** n_terms / math.factorial(n_terms) > 1e-17 and n_terms < 80:
        n_terms += 1
    x = (delta / ds).astype(np.float32)
    powers = np.cumprod(np.concatenate([np.ones((x.size, 1), np.float32),
                                        np.repeat(x[:, None], n_terms + 1, axis=1)], axis=1),
                        axis=1)  # (K, J + 2): x^0 .. x^(J+1)
    a2 = a.reshape(-1, a.shape[-1])
    # einsum, not @: BLAS would start its own threads inside the caller's worker threads
    mu = (np.einsum("ck,kj->cj", a2.real.astype(np.float32), powers).astype(float)
          + 1j * np.einsum("ck,kj->cj", a2.imag.astype(np.float32), powers)
          ).reshape(lead + (n_terms + 2,))
    inv_fact = 1.0 / np.array([math.factorial(j) for j in range(n_terms)], dtype=float)

    def t_sum(m, z):  # T_m / ds^m
        acc = mu[..., m + n_terms - 1] * inv_fact[n_terms - 1]
        for j in range(n_terms - 2, -1, -1):
            acc = acc * z + mu[..., m + j] * inv_fact[j]
        return acc

    d = np.zeros(lead)
    outside = np.zeros(lead, bool)
    for _ in range(6):  # as estimate_delays: at most six Newton steps
        z = 1j * ds * d
        t0, t1, t2 = t_sum(0, z), ds * t_sum(1, z), ds**2 * t_sum(2, z)
        carrier = np.exp(1j * om_c * d)
        g1 = (carrier * (om_c * t0 + t1)).imag  # sum c w sin(phi + w d)
        g2 = (carrier * (om_c**2 * t0 + 2 * om_c * t1 + t2)).real  # sum c w^2 cos(...)
        step = np.where(g2 > 0, g1 / np.where(g2 > 0, g2, 1.0), 0.0)
        d = np.clip(d - step, -limit_s, limit_s)
        outside |= np.abs(d) > taylor_s
        if np.all(np.abs(step) < 1e-12):
            break
    if outside.any():
        a_out = np.asarray(a[outside], dtype=complex)
        d[outside] = newton_delays(np.abs(a_out), np.angle(a_out), omega, limit_s)
    return d


def chunk_delays(spec, g, workers):
    """Delays of a chunk of windows from their band spectra ``spec`` (C, N, Ks).

    ``g`` is the call's :class:`locate.signal.windowed._Setup`.  Returns a dict of arrays with
    a leading window axis (see :class:`locate.signal.windowed.WindowDelays`).
    """
    ii, jj = g.ii, g.jj
    c_n = spec.shape[0]
    grid = g.grid
    tiny = _TINY
    if g.single:  # single precision: normalise each window's spectra to a peak of 1
        peak_abs = np.max(np.abs(spec), axis=(1, 2), keepdims=True)
        spec = (spec / np.maximum(peak_abs, 1e-300)).astype(np.complex64)
        tiny = _TINY32
    cross = np.conj(spec[:, ii]) * spec[:, jj]  # (C, P, Ks)
    mag = np.abs(cross)
    s_auto = _smoothed(spec.real**2 + spec.imag**2, g)  # (C, N, Ks)
    s_auto_q = s_auto[..., grid]
    mask = np.broadcast_to(g.mask, (c_n, g.mask.size))
    mask_q = np.broadcast_to(g.mask_q, (c_n, g.mask_q.size))
    lo_hi = np.array([g.freqs[g.mask].min(), g.freqs[g.mask].max()])

    # 1. GCC-PHAT (Knapp & Carter 1976) over the band
    norm = 2.0 * np.count_nonzero(g.mask) / g.m  # irfft(mask)[0]: no DC or Nyquist bin
    r = _inverse(cross, g.mask / (np.maximum(mag, tiny) * norm), g, workers)
    # (this pass's score only picks the pairs for the consensus below: a sparser floor will do)
    first = g.first_band if g.auto_band else lo_hi
    lag0, peak, score, second, second_lag = coarse_peaks(
        r, g, np.broadcast_to(first, (c_n, 2)), stride=6)

    # 2. coherence after removing the coarse lag; consensus over the pairs that look good
    rot = cross * _linear_phase(g.omega, lag0).astype(cross.dtype)
    s_cross = _smoothed(rot, g)
    coh = _coherence(s_cross, s_auto[:, ii], s_auto[:, jj], g)
    good = (score >= WEAK_PEAK_SCORE) & (second < AMBIGUOUS_RATIO)
    ref_q = _median_over_pairs(coh[..., grid], good)  # (C, Kq)
    bands = np.broadcast_to(lo_hi, (c_n, 2)).copy()
    if g.auto_band:
        mask, mask_q = mask.copy(), mask_q.copy()
        for c in range(c_n):  # per window: the coherent band is a cumulative search
            new = coherent_band(g.freqs_q, ref_q[c], g.mask_q)
            if new is not None and new.sum() * g.q >= 8:
                lo, hi = g.freqs_q[new].min(), g.freqs_q[new].max()
                mask[c] = g.mask & (g.freqs >= lo) & (g.freqs <= hi)
                mask_q[c] = new
                bands[c] = g.freqs[mask[c]].min(), g.freqs[mask[c]].max()

    # 3. second pass: smoothed-coherence transform weighted by the consensus coherence
    v_q = np.where(mask_q & (ref_q > g.threshold),
                   ref_q / (1.0 - np.clip(ref_q, 0, 0.9999)), 0.0)
    v = _interp(v_q, g) * mask
    second_pass = np.count_nonzero(v, axis=1) >= 4  # (C,)
    isq = 1.0 / np.sqrt(np.maximum(s_auto, tiny))  # (C, N, Ks)
    factor = v[:, None, :] * isq[:, ii] * isq[:, jj]
    norm2 = 2.0 * np.einsum("cpk,cpk->cp", factor, mag) / g.m
    r2 = _inverse(cross, factor / np.maximum(norm2, tiny)[..., None], g, workers)
    lag2, _, score2, second2, second_lag2 = coarse_peaks(r2, g, bands)
    score = np.where(second_pass[:, None], score2, 0.0)
    second = np.where(second_pass[:, None], second2, second)
    second_lag = np.where(second_pass[:, None], second_lag2, second_lag)
    moved = second_pass[:, None] & (np.abs(lag2 - lag0) > max(0.5 / g.fs, 0.5 * g.step_s))
    if moved.any():
        cw, pw = np.nonzero(moved)
        rot_m = cross[cw, pw] * _linear_phase(g.omega, lag2[cw, pw]).astype(cross.dtype)
        s_cross[cw, pw] = _smoothed(rot_m, g)
        coh[cw, pw] = _coherence(s_cross[cw, pw], s_auto[cw, ii[pw]], s_auto[cw, jj[pw]], g)
        rot[cw, pw] = rot_m
        lag0 = np.where(moved, lag2, lag0)

    # 4. fine delay: maximise sum_k w_k |G_k| / |G_smooth,k| cos(phi_k + omega_k d)
    coh = np.where(mask[:, None, :] & (coh > g.threshold), coh, 0.0)
    w = coh / (1.0 - coh)  # Hannan-Thomson weight (Carter 1987)
    kb = np.flatnonzero(np.any(w > 0, axis=(0, 1)))
    kb = slice(int(kb[0]), int(kb[-1]) + 1) if kb.size else slice(0, 0)  # zero weights: no-ops
    limit = 1.5 * max(g.step_s, 1.0 / g.fs)
    a_fine = w[..., kb] * rot[..., kb] / np.maximum(np.abs(s_cross[..., kb]), tiny)
    d = _fine_delays(a_fine, g.omega[kb], limit, taylor_s=limit / 3.0)
    delay = lag0 + d
    w_q, coh_q, s_cross_q = w[..., grid], coh[..., grid], s_cross[..., grid]

    cov, nsr = _covariance(g, w_q, coh_q, s_auto_q, s_cross_q, mask_q)
    sd = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
    quality = np.where(second >= AMBIGUOUS_RATIO, "ambiguous",
                       np.where((score < WEAK_PEAK_SCORE) | ~np.isfinite(sd), "weak", "good"))
    spectral = _spectral(g, spec, w, np.abs(a_fine), kb, nsr)
    return dict(delay_s=delay, sd_s=sd, covariance_s2=cov, peak=peak, score=score,
                second_ratio=second, quality=quality.astype("<U9"), band_hz=bands,
                second_lag_s=second_lag, spectral=spectral)


def _spectral(g, spec, w, c_abs, kb, nsr):
    """Each window's fine-delay weights and noise-free mic power, binned as in
    ``estimate_delays`` (:func:`locate.signal.delays.binned_weights`): a list of
    (freqs (B,), weights (P, B), power (N, B)) for the reflection model."""
    out = []
    for c in range(spec.shape[0]):
        own = np.flatnonzero(np.any(w[c, :, kb] > 0, axis=0))  # this window's weighted bins
        if own.size == 0:
            out.append(binned_weights(np.zeros(0), np.zeros((w.shape[1], 0)),
                                      np.zeros((spec.shape[1], 0))))
            continue
        k = own + kb.start
        power = np.abs(spec[c][:, k].astype(complex)) ** 2
        if nsr[c] is not None:
            power = power / (1.0 + _interp(nsr[c], g)[:, k])
        out.append(binned_weights(g.freqs[k], c_abs[c][:, own].astype(float), power))
    return out


def _covariance(g, w, coh, s_auto, s_cross, mask):
    """Delay covariance of each window on the grid bins
    (:func:`locate.signal.delays.delay_covariance`).

    The sums over bins are Riemann sums on the grid (each grid bin stands for ``q`` bins, so
    the bin count ``n_samp`` is taken ``q`` times larger).  Windows where every pair carries
    weight share one least-squares split of the per-mic signal spectra (the design over pairs
    is the same); the others go through the per-window function.
    """
    ii, jj = g.ii, g.jj
    c_n, n_p, _ = w.shape
    n_mics = g.n_mics
    w, coh, s_auto = (np.asarray(v, dtype=float) for v in (w, coh, s_auto))
    s_cross = np.asarray(s_cross, dtype=complex)
    om = g.omega_q
    n_eff = g.n * g.q
    d_norm = np.sum(w * om**2, axis=-1)  # (C, P)
    fast = (d_norm > 0).all(axis=1) & g.full_design
    cov = np.zeros((c_n, n_p, n_p))
    nsr = [None] * c_n  # per-mic noise-to-signal ratio on the grid bins, (N, Kq)
    for c in np.flatnonzero(~fast):  # rare: dead pairs, two mics
        cov[c], a_c = delay_covariance(g.pairs, n_mics, w[c], coh[c], s_auto[c], s_cross[c],
                                       om, n_eff, g.nfft, mask[c])
        bins = np.flatnonzero(mask[c] & np.any(w[c] > 0, axis=0))
        if a_c is not None and a_c.shape[1] == bins.size:
            full = np.zeros((n_mics, om.size))
            full[:, bins] = a_c
            nsr[c] = full
    idx = np.flatnonzero(fast)
    if idx.size == 0:
        return cov, nsr
    wf = w[idx]
    log_cross = np.log(np.maximum(np.abs(s_cross[idx]), _TINY))  # (F, P, Kq)
    log_sig = np.einsum("np,fpk->fnk", g.design_pinv, log_cross)
    with np.errstate(invalid="ignore", over="ignore"):
        a = s_auto[idx] / np.exp(log_sig) - 1.0
    a = np.where(np.isfinite(a), np.clip(a, 1e-6, 1e6), 1e6)  # (F, N, Kq)
    for r, c in enumerate(idx):
        nsr[c] = a[r]
    covf = np.zeros((idx.size, n_p, n_p))
    for u in range(n_mics):
        sel = np.flatnonzero((ii == u) | (jj == u))
        sign = np.where(ii[sel] == u, 1.0, -1.0)
        f = wf[:, sel] * om * np.sqrt(a[:, u] / 2.0)[:, None, :]
        covf[:, sel[:, None], sel[None, :]] += (np.outer(sign, sign)
                                                * np.einsum("fak,fbk->fab", f, f))
    diag = np.arange(n_p)
    covf[:, diag, diag] += np.sum(wf**2 * om**2 * (a[:, ii] * a[:, jj] / 2.0), axis=-1)
    scale = g.nfft / n_eff
    covf *= scale
    dn = d_norm[idx]
    covf /= dn[:, :, None] * dn[:, None, :]
    carter = scale / (2.0 * dn)  # Carter's bound per pair, as estimate_delays
    model = covf[:, diag, diag]
    ratio = np.where(model > 0, np.sqrt(np.maximum(model, carter)
                                        / np.where(model > 0, model, 1.0)), 1.0)
    cov[idx] = covf * ratio[:, :, None] * ratio[:, None, :] * VARIANCE_MARGIN
    return cov, nsr
