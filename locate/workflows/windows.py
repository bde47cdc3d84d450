"""``tdoa fix --window W``: every window of a span with the full treatment of one fix, batched.

Each window gets what :func:`locate.workflows.fixing.fix_span` gives one span - per-pair
delays with their sds and quality, the ground-reflection term, the declared survey/clock/air
uncertainties, the integrity test, the first-arrival (echo) check, the geometry notes, the
uncertainty budget, warnings with the site's mic names - but the heavy steps run over many
windows at once, block by block (memory: one block, whatever the span):

1. **Delays** of a block of windows at once (:func:`locate.signal.windowed.
   estimate_delays_windows`, the estimator of :func:`locate.signal.delays.estimate_delays`),
   each mic's windows shifted by its arrival offset from a first pass over the start of the
   span (:mod:`locate.fix.align`; a steady source keeps its offsets).
2. **Fixes** with the batched locator (:func:`locate.fix.batched.locate_batch`): the
   timing-only first fix that places the ground reflection, the passes that settle the
   declared-uncertainty covariance at the fix (as :func:`locate.accuracy.budget.
   extra_covariance_hook`), and the final fix.  A window the batched locator does not settle
   as plainly consistent (a closure misfit, a failed integrity test, a mic to reject, no
   convergence, far outside the array) and every window of a block whose first window shows
   a second (mirror) position are fixed by :func:`locate.fix.solver.locate_source`, with the
   same inputs, as a single span would be.
3. **The rest** - reflection term, checks, budget, entry - through the same functions as one
   span (:func:`locate.workflows.fixing.finish_entry`).

Windows over which a mic has no audio (a deployment with gaps) go through ``fix_span``.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from locate.errors import NothingFoundError, TdoaError
from locate.fix.align import arrival_shifts_s, shifted_span_inside
from locate.fix.batched import locate_batch
from locate.fix.solver import REJECT_P_VALUE, Fix, locate_source
from locate.io.audio import check_signals
from locate.signal.delays import all_pairs, estimate_delays
from locate.signal.windowed import estimate_delays_windows
from locate.workflows.fixing import (
    _absent_mics,
    _aligned_delays,
    delay_warnings,
    finish_entry,
    fix_sds,
    fix_span,
    ground_datum_m,
    reflection_uncertainty,
    search_lags_s,
)

__all__ = ["window_fixes", "BLOCK_WINDOWS"]

BLOCK_WINDOWS = 16
"""Windows analysed together: a block of 8 channels of 0.5 s windows at 48 kHz holds ~8 s of
audio (~25 MB in float64 with its band spectra): memory does not grow with the span."""


def _batched_fix(bf, w, names, dims):
    """A :class:`locate.fix.solver.Fix` from row ``w`` of a plainly consistent batched set (no
    closure misfit, no rejection, integrity test passed: no warning to carry)."""
    return Fix(position_m=bf.position_m[w].copy(), covariance_m2=bf.covariance_m2[w].copy(),
               used=~bf.rejected[w], rejected_mics=[], dead_mics=[], dropped_pairs=[],
               residual_rms_s=float(bf.residual_rms_s[w]), chi2=float(bf.chi2[w]),
               dof=max(int(bf.dof[w]), 0), p_value=float(bf.p_value[w]),
               mirror_position_m=None, warnings=[], converged=bool(bf.converged[w]),
               dims=dims)


def _plain(bf):
    """Sets the batched locator settled without anything a single fix would say about."""
    misfit = (bf.dof > 0) & (bf.p_value < REJECT_P_VALUE)
    return (~bf.single & bf.converged & ~bf.rejected.any(axis=1) & ~misfit
            & (bf.closure_inflation <= 1.0) & np.isfinite(bf.position_m).all(axis=1))


def _settled_extra(sets, positions, cond, sds, kw, batch):
    """The declared-uncertainty delay covariance of every set at its settled fix, (W, P, P):
    the passes of :func:`locate.accuracy.budget.extra_covariance_hook`, batched.  Sets the
    batched locator does not settle plainly go through the hook itself."""
    from locate.accuracy.budget import MAX_PASSES, SETTLE_FRACTION, extra_covariance_hook
    from locate.accuracy.inputs import has_nuisance
    from locate.accuracy.propagation import nuisance_delay_covariance

    n_w = len(sets)
    if not has_nuisance(sds):
        return [None] * n_w
    pairs = sets[0].pairs

    def extra_at(p):
        return nuisance_delay_covariance(p, positions, pairs, cond.sound_speed_mps,
                                         cond.wind_mps, sds)

    bf = batch(None)
    plain = _plain(bf)
    extra = [None] * n_w
    active = plain.copy()
    pos = bf.position_m.copy()
    n_fits = 1
    while n_fits < max(MAX_PASSES - 1, 2) and active.any():
        for w in np.flatnonzero(active):
            extra[w] = extra_at(pos[w])
        bf = batch(np.array([e if e is not None else np.zeros((len(pairs),) * 2)
                             for e in extra]))
        n_fits += 1
        ok = _plain(bf)
        plain &= ok | ~active
        cov = bf.covariance_m2[:, :kw["dims"], :kw["dims"]]
        with np.errstate(invalid="ignore"):
            sd_min = np.sqrt(np.clip(np.linalg.eigvalsh(0.5 * (cov + np.swapaxes(cov, 1, 2)))
                                     [:, 0], 0.0, None))
        move = np.linalg.norm(bf.position_m - pos, axis=1)
        done = ~np.isfinite(sd_min) | (move <= SETTLE_FRACTION * sd_min)
        pos = np.where(active[:, None], bf.position_m, pos)
        active &= ~done & ok
    out = [extra_at(pos[w]) if plain[w] else None for w in range(n_w)]
    hook = extra_covariance_hook(positions, sds, **kw)
    for w in np.flatnonzero(~plain):  # as one span does it
        out[w] = hook(sets[w], cond)
    return out


def window_fixes(recordings, site, cond, start_s, stop_s, window_s, hop_s=None, *,
                 band_hz=None, dims=2, source_z_m=0.0, source_z_sd_m=0.0, reject=True,
                 progress=None, block_windows=BLOCK_WINDOWS, workers=1):
    """Fix every window of ``[start_s, stop_s)``, each with the treatment of one span.

    Parameters
    ----------
    recordings : locate.io.audio.Recordings
    site : locate.io.site.Site
    cond : locate.workflows.fixing.Conditions
    start_s, stop_s : float
    window_s : float
        Window length, s.
    hop_s : float, optional
        Step between window starts (default: ``window_s``, windows end to end).
    band_hz, dims, source_z_m, source_z_sd_m, reject
        As :func:`locate.workflows.fixing.fix_span`.
    progress : callable, optional
        Called with the number of windows done after each block.
    block_windows : int
        Windows analysed together (memory: one block).
    workers : int
        Threads of the windowed delays.  Default 1: each extra thread keeps its own heap
        (glibc arena) of the block's temporaries - 8 ch x 48 kHz peaked at ~410 MB with two
        threads against ~250 MB with one - and the windows' Python work is serial anyway.

    Returns
    -------
    entries : list of dict
        Result-JSON fix entries (as ``fix_span``'s), in time order, of the windows that gave
        a position.
    notes : list of str
        One line per window that gave none (why).
    """
    hop_s = window_s if hop_s is None else float(hop_s)
    fs = recordings.sample_rate_hz
    n, hop = int(round(window_s * fs)), int(round(hop_s * fs))
    positions, names = site.positions_m, site.mic_names
    pairs = all_pairs(len(names))
    max_lag = search_lags_s(site, cond, pairs)
    # each mic's windows cut at its arrival offset (locate.fix.align), from a first pass over
    # the start of the span (as one span's second pass, with the offsets of the first)
    pilot_stop = min(stop_s, start_s + max(1.0, 2.0 * window_s))
    signals, residual = recordings.read(start_s, pilot_stop)
    pilot = estimate_delays(signals, fs, max_lag_s=max_lag, band_hz=band_hz, pairs=pairs,
                            offsets_s=residual)
    del signals
    # windows whose shifted span would leave the recordings (the first and last few, by at
    # most the largest shift) are not aligned by one span either: they go through fix_span
    shifts = arrival_shifts_s(pilot, len(names))
    if shifts is None:
        shifted, shifts = recordings, np.zeros(len(names))
    else:
        shifted = recordings.with_clocks(recordings.offsets_s - shifts, recordings.drift_ppm)
    move = shifts[pairs[:, 1]] - shifts[pairs[:, 0]]
    lag = max_lag if not np.any(move) else np.maximum(max_lag - np.abs(move), 0.0) + 1e-3
    # without a band: searched for in every window, up to half again the first pass's top
    # (a steady source keeps its band; the inverse transforms then run at a decimated size)
    search = None if band_hz is not None else (20.0, min(1.5 * pilot.band_hz[1], 0.45 * fs))
    sds, models = fix_sds(site, dims, source_z_sd_m)
    z_sd = source_z_sd_m if dims == 2 else 0.0
    kw = dict(dims=dims, source_z_m=source_z_m, reject=reject, mic_names=names,
              model_sds=models)
    starts = np.arange(int(np.floor((stop_s - start_s) * fs + 1e-6) - n) // hop + 1) * hop
    entries, notes = [], []
    t_a = start_s + starts / fs
    inside = shifted_span_inside(recordings, shifts, t_a, t_a + n / fs)
    edge_kw = dict(band_hz=band_hz, dims=dims, source_z_m=source_z_m, reject=reject,
                   source_z_sd_m=source_z_sd_m)

    def one_span(a):
        try:
            entries.append(fix_span(recordings, site, cond, a, a + n / fs, t_s=a,
                                    **edge_kw)[0])
        except (NothingFoundError, TdoaError) as exc:
            notes.append(f"span {a:.3f}..{a + n / fs:.3f} s: {exc.message}")
        if progress is not None:
            progress(1)

    lead = int(np.argmax(inside)) if inside.any() else len(starts)
    tail = len(starts) - int(np.argmax(inside[::-1])) if inside.any() else len(starts)
    for k in range(lead):
        one_span(float(t_a[k]))
    bw = max(int(block_windows), 1)
    for b0 in range(lead, tail, bw):
        st = starts[b0:min(b0 + bw, tail)]
        a_s = start_s + st[0] / fs
        b_s = start_s + (st[-1] + n) / fs
        block, res = shifted.read(a_s, b_s)
        wd = estimate_delays_windows(block, fs, n / fs, hop / fs, max_lag_s=lag,
                                     band_hz=band_hz, pairs=pairs, offsets_s=res + shifts,
                                     t0_s=a_s, workers=workers, search_band_hz=search)
        del block
        spans = [(float(t), float(t) + n / fs) for t in wd.t_s]
        absent = [bool(_absent_mics(recordings, site, cond, a, b)) for a, b in spans]
        sets = [replace(wd.window(w), max_lag_s=max_lag) for w in range(len(wd))]
        if not np.any(shifts):  # no steady sound at the first pass: as one span, window by
            for w, (a, b) in enumerate(spans):  # window (a sound across a window's ends)
                if not absent[w]:
                    samples, _ = recordings.read(a, b)
                    sets[w] = _aligned_delays(recordings, samples, sets[w], a, b, band_hz,
                                              max_lag, False)
        # 1. the ground reflection at a first, timing-only fix (batched)
        # (any ground: a WGS84 site's is taken a typical mic height below the lowest mic)
        first = locate_batch(positions, wd.delay_s, wd.covariance_s2, cond.sound_speed_mps,
                             pairs=pairs, wind_mps=cond.wind_mps, dims=dims,
                             source_z_m=source_z_m, reject=True)
        datum = ground_datum_m(site)
        sets = [reflection_uncertainty(ds, positions, cond, dims=dims,
                                       source_z_m=source_z_m, source_z_sd_m=z_sd,
                                       mic_names=names, ground_z_m=datum,
                                       first=(first.position_m[w], first.covariance_m2[w]))
                for w, ds in enumerate(sets)]
        d_all = np.array([ds.delay_s for ds in sets])
        q_all = np.array([ds.covariance_s2 for ds in sets])

        def batch(extra, d_all=d_all, q_all=q_all):
            return locate_batch(positions, d_all, q_all, cond.sound_speed_mps, pairs=pairs,
                                wind_mps=cond.wind_mps, dims=dims, source_z_m=source_z_m,
                                reject=reject, fallback=False, extra_covariance_s2=extra)

        # 2. declared uncertainties settled at each fix, then the final fixes (batched)
        extras = _settled_extra(sets, positions, cond, sds, kw, batch)
        zero = np.zeros((len(pairs), len(pairs)))
        bf = batch(None if all(e is None for e in extras)
                   else np.array([zero if e is None else e for e in extras]))
        plain = _plain(bf)
        done = {}
        sentinel = np.flatnonzero(plain & ~np.array(absent))
        if sentinel.size:
            # the single locator on the block's first plain window: a second (mirror)
            # position or a note (an enlarged ellipse, far outside the array) is a property of
            # the geometry here - then every window of the block goes through it as well
            w0 = int(sentinel[0])
            done[w0] = locate_source(positions, sets[w0], cond.sound_speed_mps,
                                     wind_mps=cond.wind_mps, extra_covariance_s2=extras[w0],
                                     **kw)
            if done[w0].mirror_position_m is not None or done[w0].warnings:
                plain[:] = False
        # 3. checks, budget, entries
        for w, ds in enumerate(sets):
            a, b = spans[w]
            try:
                if absent[w]:
                    entry = fix_span(recordings, site, cond, a, b, band_hz=band_hz, dims=dims,
                                     source_z_m=source_z_m, reject=reject, t_s=a,
                                     source_z_sd_m=source_z_sd_m)[0]
                    entries.append(entry)
                    continue
                if w in done:
                    fx = done[w]
                elif plain[w]:
                    fx = _batched_fix(bf, w, names, dims)
                else:
                    fx = locate_source(positions, ds, cond.sound_speed_mps,
                                       wind_mps=cond.wind_mps, extra_covariance_s2=extras[w],
                                       **kw)
            except (NothingFoundError, TdoaError) as exc:
                notes.append(f"span {a:.3f}..{b:.3f} s: {exc.message}")
                continue
            if not np.all(np.isfinite(fx.position_m)):
                notes.append(f"span {a:.3f}..{b:.3f} s: no position (no usable delays or "
                             "geometry)")
                continue
            samples, _ = recordings.read(a, b)
            warnings = check_signals(samples, names) + delay_warnings(ds, names)
            entries.append(finish_entry(fx, ds, samples, fs, site, cond, sds, warnings,
                                        t_s=a, span_s=(a, b)))
        if progress is not None:
            progress(len(st))
    for k in range(tail, len(starts)):
        one_span(float(t_a[k]))
    return entries, notes
