"""Timing models for planning: how well will the pair delays be measured?

Two ways to say it:

* **Given accuracy** - an arrival-time standard deviation per mic, errors independent between
  mics.  The pair delays then have covariance  Q = A diag(sd^2) A^T  with A the (P, N) pair
  incidence matrix (row of pair (i, j): -1 at i, +1 at j, since ``delay = t_j - t_i``).
* **Predicted from the sound** - Carter's bound (Carter 1987, Proc. IEEE 75(2) 236-255) for an
  unknown Gaussian signal in independent noise, which the ML-weighted estimator of
  :mod:`locate.signal.delays` approaches:

      var(D_ij) = [ 2 T  integral_0^inf (2 pi f)^2  gamma^2 / (1 - gamma^2) df ]^-1

  with T the analysed duration and the magnitude-squared coherence of the pair from the
  per-mic signal-to-noise ratios, gamma^2 = 1 / ((1 + 1/snr_i) (1 + 1/snr_j)), so that
  gamma^2 / (1 - gamma^2) = 1 / (a_i + a_j + a_i a_j) with a = 1/snr the noise-to-signal
  ratio.  Pairs that share a mic are correlated; their covariance follows from the same
  linearised phase-error model as :func:`locate.signal.delays.estimate_delays` uses (phase error of
  pair (i, j) per independent frequency cell e_i - e_j + n_ij, var(e_u) = a_u / 2,
  var(n_ij) = a_i a_j / 2), whose diagonal is exactly Carter's bound.

SNR convention
--------------
``snr_db`` is **in-band**: signal power over noise power, both within ``band_hz``, averaged
over the analysed span of ``duration_s`` (the span the delays are measured on).  For a
white-in-band sound the SNR is the same in every frequency cell of the band.  A broadband
figure with noise white up to the Nyquist frequency converts with :func:`in_band_snr_db`.
At high SNR only the product ``duration x snr`` matters (var ~ a / (T integral w^2)), so a
span longer than the sound, with its SNR diluted accordingly, predicts the same.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from locate.errors import OptionError
from locate.geometry.pairs import incidence_matrix
from locate.signal.delays import all_pairs

__all__ = ["TimingModel", "timing_model", "timing_from_spectra", "carter_delay_sd_s",
           "in_band_snr_db"]

_N_FREQ = 256  # frequency cells for the white-in-band integral (midpoint rule, rel. error 1e-6)


def in_band_snr_db(broadband_snr_db, band_hz, sample_rate_hz):
    """In-band SNR of a sound confined to ``band_hz`` in noise white from 0 to fs / 2.

    Only the fraction (hi - lo) / (fs / 2) of the noise power falls in the band:
    snr_in = snr + 10 log10((fs / 2) / (hi - lo)).
    """
    lo, hi = (float(b) for b in band_hz)
    return np.asarray(broadband_snr_db, float) + 10.0 * np.log10(0.5 * sample_rate_hz / (hi - lo))


def carter_delay_sd_s(band_hz, duration_s, snr_i_db, snr_j_db=None):
    """Carter's bound for one pair and a white-in-band sound, closed form.

    sd = sqrt(3 (a_i + a_j + a_i a_j) / (2 T (2 pi)^2 (f_hi^3 - f_lo^3))), a = 10^(-snr/10):
    the integral of (2 pi f)^2 over the band is (2 pi)^2 (f_hi^3 - f_lo^3) / 3 (Carter 1987).
    """
    lo, hi = (float(b) for b in band_hz)
    a_i = 10.0 ** (-np.asarray(snr_i_db, float) / 10.0)
    a_j = a_i if snr_j_db is None else 10.0 ** (-np.asarray(snr_j_db, float) / 10.0)
    var = 3.0 * (a_i + a_j + a_i * a_j) / (2.0 * duration_s * (2 * np.pi) ** 2 * (hi**3 - lo**3))
    return np.sqrt(var)


@dataclass(frozen=True, eq=False)
class TimingModel:
    """How well the arrival times or pair delays of N mics are measured.

    Attributes
    ----------
    kind : {'arrival_sd', 'carter'}
    arrival_sd_s : ndarray, shape (N,) or None
        Given arrival-time standard deviation per mic ('arrival_sd').
    freqs_hz : ndarray, shape (K,) or None
        Uniform frequency cells of the band ('carter').
    noise_to_signal : ndarray, shape (N, K) or None
        a = 1 / snr per mic and cell ('carter').
    duration_s : float or None
        Analysed duration T ('carter').
    band_hz : tuple or None
    snr_db : ndarray, shape (N,) or None
        In-band SNR per mic, when given that way.
    extra_arrival_cov_s2 : ndarray, shape (N, N) or None
        Arrival-time covariance from declared survey and clock uncertainties
        (:func:`with_declared`), added to the measurement's.
    """

    kind: str
    arrival_sd_s: np.ndarray | None = None
    freqs_hz: np.ndarray | None = None
    noise_to_signal: np.ndarray | None = None
    duration_s: float | None = None
    band_hz: tuple | None = None
    snr_db: np.ndarray | None = None
    extra_arrival_cov_s2: np.ndarray | None = None

    @property
    def n_mics(self) -> int:
        src = self.arrival_sd_s if self.kind == "arrival_sd" else self.noise_to_signal
        return int(len(src))

    def pair_covariance_s2(self, pairs=None):
        """Covariance of the pair delays, shape (P, P), s^2 (default: all pairs i < j)."""
        n = self.n_mics
        pairs = all_pairs(n) if pairs is None else np.asarray(pairs, dtype=int).reshape(-1, 2)
        extra = 0.0
        if self.extra_arrival_cov_s2 is not None:
            a = incidence_matrix(pairs, n)
            extra = a @ self.extra_arrival_cov_s2 @ a.T
        if self.kind == "arrival_sd":
            a = incidence_matrix(pairs, n)
            return (a * self.arrival_sd_s**2) @ a.T + extra
        f, nsr, t = self.freqs_hz, self.noise_to_signal, float(self.duration_s)
        df = float(f[1] - f[0]) if len(f) > 1 else 1.0
        om2 = (2 * np.pi * f) ** 2
        ai, aj = nsr[pairs[:, 0]], nsr[pairs[:, 1]]
        w = 1.0 / (ai + aj + ai * aj)  # gamma^2 / (1 - gamma^2): Hannan-Thomson weight
        d = np.sum(w * om2, axis=1)  # (P,)
        sign = -incidence_matrix(pairs, n)  # +1 at i: phase error e_i - e_j
        cov = np.zeros((len(pairs), len(pairs)))
        for u in range(n):
            fu = sign[:, u, None] * w * np.sqrt(om2 * nsr[u] / 2.0)
            cov += fu @ fu.T
        cov[np.diag_indices(len(pairs))] += np.sum(w**2 * om2 * ai * aj / 2.0, axis=1)
        # sums over cells 1/T wide: each sum is T df sum_k; the ratio keeps one 1/(T df)
        return cov / np.outer(d, d) / (t * df) + extra

    def information_weights(self):
        """M = A^T Q^+ A, shape (N, N), 1/s^2: position information is G^T M G.

        For independent arrival errors this is W - w w^T / sum(w) with w = 1/sd^2 (the
        emission time eliminated); otherwise the pseudo-inverse over all pairs.
        """
        if self.kind == "arrival_sd" and self.extra_arrival_cov_s2 is None:
            w = 1.0 / self.arrival_sd_s**2
            return np.diag(w) - np.outer(w, w) / w.sum()
        pairs = all_pairs(self.n_mics)
        a = incidence_matrix(pairs, self.n_mics)
        return a.T @ np.linalg.pinv(self.pair_covariance_s2(pairs), hermitian=True) @ a

    def equivalent_arrival_sd_s(self):
        """Per-mic arrival-time sd, shape (N,): given, or the high-SNR part of Carter's bound
        (var_u = a_u / (2 T integral (2 pi f)^2 df), half of a high-SNR pair's variance)."""
        if self.kind == "arrival_sd":
            return np.asarray(self.arrival_sd_s, float)
        df = float(self.freqs_hz[1] - self.freqs_hz[0]) if len(self.freqs_hz) > 1 else 1.0
        om2 = (2 * np.pi * self.freqs_hz) ** 2
        return np.sqrt(1.0 / (2.0 * self.duration_s * df * np.sum(om2 / self.noise_to_signal,
                                                                   axis=1)))

    def with_declared(self, extra_arrival_cov_s2) -> TimingModel:
        """The same model plus an arrival-time covariance (N, N) from declared uncertainties."""
        extra = np.asarray(extra_arrival_cov_s2, float).reshape(self.n_mics, self.n_mics)
        return dataclasses.replace(self, extra_arrival_cov_s2=extra if np.any(extra) else None)

    def with_mics(self, n_new=1):
        """The model for the same mics plus ``n_new`` more, each with the median of theirs
        (a declared survey/clock variance too, as an independent one)."""
        extra = None
        if self.extra_arrival_cov_s2 is not None:
            n = self.n_mics
            extra = np.zeros((n + n_new, n + n_new))
            extra[:n, :n] = self.extra_arrival_cov_s2
            extra[np.arange(n, n + n_new), np.arange(n, n + n_new)] = np.median(
                np.diag(self.extra_arrival_cov_s2))
        if self.kind == "arrival_sd":
            sd = np.append(self.arrival_sd_s, np.full(n_new, np.median(self.arrival_sd_s)))
            return TimingModel("arrival_sd", arrival_sd_s=sd, extra_arrival_cov_s2=extra)
        nsr = np.vstack([self.noise_to_signal,
                         np.repeat(np.median(self.noise_to_signal, axis=0)[None], n_new, 0)])
        snr = None if self.snr_db is None else np.append(self.snr_db,
                                                         np.full(n_new, np.median(self.snr_db)))
        return TimingModel("carter", freqs_hz=self.freqs_hz, noise_to_signal=nsr,
                           duration_s=self.duration_s, band_hz=self.band_hz, snr_db=snr,
                           extra_arrival_cov_s2=extra)

    def describe(self) -> str:
        """One line for captions and summaries."""
        text = self._describe_measurement()
        if self.extra_arrival_cov_s2 is not None:
            ex = np.sqrt(np.diag(self.extra_arrival_cov_s2)) * 1e6
            text += (f"; declared survey/clock uncertainty adds up to {ex.max():.3g} µs per "
                     "mic")
        return text

    def _describe_measurement(self) -> str:
        sd = self.equivalent_arrival_sd_s() * 1e6
        sd_txt = (f"{sd[0]:.3g} µs" if np.ptp(sd) <= 1e-3 * sd.max()
                  else f"{sd.min():.3g}–{sd.max():.3g} µs")
        if self.kind == "arrival_sd":
            return f"arrival-time sd {sd_txt} per mic, independent between mics"
        lo, hi = self.band_hz if self.band_hz else (self.freqs_hz[0], self.freqs_hz[-1])
        snr = ""
        if self.snr_db is not None:
            s = np.asarray(self.snr_db, float)
            snr = (f", in-band SNR {s[0]:.3g} dB" if np.ptp(s) < 0.05
                   else f", in-band SNR {s.min():.3g}–{s.max():.3g} dB")
        return (f"Carter bound for a {self.duration_s:.3g} s sound, {lo:.0f}–{hi:.0f} Hz{snr}"
                f" (about {sd_txt} per mic)")

    def to_dict(self) -> dict:
        out = {"kind": self.kind, "description": self.describe(),
               "arrival_sd_s": [float(v) for v in self.equivalent_arrival_sd_s()]}
        if self.kind == "carter":
            out.update(duration_s=float(self.duration_s),
                       band_hz=[float(b) for b in (self.band_hz or (self.freqs_hz[0],
                                                                     self.freqs_hz[-1]))])
            if self.snr_db is not None:
                out["snr_db"] = [float(v) for v in self.snr_db]
        if self.extra_arrival_cov_s2 is not None:
            out["declared_arrival_cov_s2"] = self.extra_arrival_cov_s2.tolist()
        return out


def _per_mic(value, n, name, field):
    v = np.asarray(value, dtype=float)
    if v.ndim == 0:
        v = np.full(n, float(v))
    if v.shape != (n,) or not np.all(np.isfinite(v)):
        raise OptionError(f"{name} must be a finite number or one per mic ({n}), got "
                          f"{value!r}", field=field)
    return v


def timing_model(n_mics, *, timing_sd_s=None, band_hz=None, snr_db=None, duration_s=None,
                 n_freq=_N_FREQ):
    """The timing model from a given accuracy or from the sound's band, duration and SNR.

    Parameters
    ----------
    n_mics : int
    timing_sd_s : float or array_like (N,), optional
        Arrival-time standard deviation per mic, seconds.
    band_hz : (float, float), optional
        Band of the sound, Hz (white within it).
    snr_db : float or array_like (N,), optional
        In-band SNR per mic over the analysed span (module docstring).
    duration_s : float, optional
        Analysed duration of the sound, seconds.

    Returns
    -------
    TimingModel

    Raises
    ------
    OptionError
        Neither or both ways given, or a value out of range.
    """
    n = int(n_mics)
    carter = [band_hz, snr_db, duration_s]
    if timing_sd_s is not None:
        if any(v is not None for v in carter):
            raise OptionError("give either a timing accuracy (timing_sd_s) or the sound's band, "
                              "SNR and duration (band_hz, snr_db, duration_s), not both",
                              field="timing_sd_s")
        sd = _per_mic(timing_sd_s, n, "timing_sd_s", "--timing-sd")
        if np.any(sd <= 0):
            raise OptionError(f"timing sd must be positive seconds, got {timing_sd_s!r}",
                              field="timing_sd_s")
        return TimingModel("arrival_sd", arrival_sd_s=sd)
    if any(v is None for v in carter):
        missing = [k for k, v in zip(("band_hz", "snr_db", "duration_s"), carter, strict=True)
                   if v is None]
        raise OptionError("the timing model needs a timing accuracy (timing_sd_s), or the "
                          f"sound's band, SNR and duration (missing {', '.join(missing)})",
                          field=missing[0])
    try:
        lo, hi = (float(b) for b in band_hz)
    except (TypeError, ValueError):
        raise OptionError(f"band must be two frequencies (lo, hi) in Hz, got {band_hz!r}",
                          field="band_hz") from None
    if not (np.isfinite(lo) and np.isfinite(hi) and 0 <= lo < hi):
        raise OptionError(f"band must satisfy 0 <= lo < hi (Hz), got {band_hz!r}",
                          field="band_hz")
    if not (np.isfinite(duration_s) and duration_s > 0):
        raise OptionError(f"duration must be positive seconds, got {duration_s!r}",
                          field="duration_s")
    snr = _per_mic(snr_db, n, "snr_db", "--snr")
    edges = np.linspace(lo, hi, int(n_freq) + 1)
    f = 0.5 * (edges[:-1] + edges[1:])
    nsr = np.repeat(10.0 ** (-snr / 10.0)[:, None], len(f), axis=1)
    return TimingModel("carter", freqs_hz=f, noise_to_signal=nsr, duration_s=float(duration_s),
                       band_hz=(lo, hi), snr_db=snr)


def timing_from_spectra(freqs_hz, snr, duration_s):
    """Carter timing model from per-frequency SNR spectra (a sound that is not white).

    Parameters
    ----------
    freqs_hz : array_like, shape (K,)
        Uniformly spaced frequency cells (their spacing is the integration step).
    snr : array_like, shape (N, K)
        Signal PSD over noise PSD per mic and cell (linear, positive).
    duration_s : float

    Returns
    -------
    TimingModel
    """
    f = np.asarray(freqs_hz, float)
    s = np.asarray(snr, float)
    if f.ndim != 1 or len(f) < 2 or np.ptp(np.diff(f)) > 1e-6 * abs(f[1] - f[0]):
        raise OptionError("freqs_hz must be at least 2 uniformly spaced frequencies",
                          field="freqs_hz")
    if s.ndim != 2 or s.shape[1] != len(f) or not np.all(s > 0):
        raise OptionError(f"snr must be positive with shape (N, {len(f)})", field="snr")
    return TimingModel("carter", freqs_hz=f, noise_to_signal=1.0 / s, duration_s=float(duration_s),
                       band_hz=(float(f[0]), float(f[-1])))
