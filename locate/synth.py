"""Exact scenario simulator: what synchronised microphones would record.

Pure numpy/scipy; all randomness comes from the ``numpy.random.Generator`` passed as ``rng``.
Sources:

* Spherical spreading (textbook): pressure falls as 1/r; -6 dB per doubling of distance.
* Atmospheric absorption: ISO 9613-1:1993 via :func:`locate.physics.air.absorption_db_per_m`,
applied
  as the zero-phase gain 10**(-alpha(f) r / 20).
* Travel time in a uniform wind: :func:`locate.physics.air.travel_time_s`.
* Ground reflection (textbook image method): a plane z = 0 with a frequency-independent
  reflection coefficient Q; the image source sits at (x, y, -z).
* Retarded (emission) time of a moving source (textbook kinematics): t = t_e + tau with
  |m - p(t_e) - w tau| = c tau; a quadratic in tau for straight, constant-velocity motion.

Definitions
-----------
Time zero of a waveform (``u = 0``) is the first sample of the emitted burst; ``t_emit_s`` is
when it leaves the source and ``arrivals_s`` when it reaches each mic (true time).  Signals are
pressures in Pa; a waveform's ``rms_pa_at_1m`` is its rms over ``duration_s`` at 1 m.

Clocks follow the site-file convention ("offset_s is added to this mic's times to get true
time") and a drift in ppm: sample ``n`` of mic ``i`` is recorded at its clock time ``n / fs``,
which is the true time ``n / (fs (1 + ppm_i 1e-6)) + offset_i``.

SNR (``snr_db``) is per channel: the noise variance of channel i is the mean square of that
channel's received *direct* sound over the emission duration, averaged over the events, divided
by 10**(snr_db / 10).  For a burst the mean square is the energy of the direct arrival divided
by the waveform's ``duration_s``; for a moving source it is the mean square over the samples
whose emission time lies in [t_start_s, t_stop_s].  ``noise_rms`` sets an absolute level.

Accuracy
--------
Stationary sources are delayed in the frequency domain (exact for the band-limited emitted
signal, which is the trigonometric interpolant of its samples).  Moving sources, and clock
drift, evaluate a band-limited signal sampled at 4x the output rate at the exact times with a
16-tap Kaiser-windowed sinc (beta = 18, 8192-phase table with linear interpolation): measured
maximum error 1.1e-8 of the signal rms for content up to 0.45 fs (3e-9 of the peak for a
1-2 kHz tone), i.e. far below 1 ns in time.  Content must stay below 0.45 fs, which leaves
room for Doppler up-shifts of about 10 %.
Amplitude of a moving source: s(t_e) / |m - p(t_e)| (no Doppler amplitude factor); its
absorption is applied block-wise (Hann-windowed 50 % overlap-add, ~43 ms hops at 48 kHz) at each
block's mean distance.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sfft
from scipy.interpolate import CubicSpline
from scipy.special import i0

from locate.errors import ConvergenceError
from locate.physics import air

__all__ = [
    "Waveform", "recorded_waveform", "Emission", "StraightPath", "WaypointPath", "Simulation",
    "emitted_signal", "emission_time_s", "simulate_events", "simulate_moving",
]

_OVERSAMPLE = 4          # source oversampling for exact-time evaluation
_HALF_TAPS = 8           # kernel half-width, oversampled samples (16 taps)
_KAISER_BETA = 18.0      # chosen by measurement (max error 1.1e-8 rms, module docstring)
_PHASES = 8192           # kernel table resolution per tap
_MAX_BAND = 0.45         # highest content as a fraction of the output sample rate
_KINDS = ("noise", "impulse", "chirp", "tone", "recording")


@dataclass(frozen=True)
class Waveform:
    """What a source emits.

    Parameters
    ----------
    kind : {'noise', 'impulse', 'chirp', 'tone', 'recording'}
        Band-limited noise burst; decaying band-limited noise bang (-60 dB at ``duration_s``);
        linear chirp from ``band_hz[0]`` to ``band_hz[1]``; sum of harmonics of
        ``fundamental_hz`` with relative amplitudes ``harmonics``; a recorded sound
        (``samples`` at ``samples_rate_hz``), resampled (scipy.signal.resample_poly), cut to
        below 0.45 of the output sample rate and looped (overlap-added over ``taper_s``, the
        length of the fades the excerpt must carry at both ends) to cover the emission.
    band_hz : (float, float)
        Band for noise, impulse and chirp, Hz; below 0.45 of the output sample rate.  Noise
        spectra fall off with raised-cosine edges inside the band (10 % of its width).
    duration_s : float
        Length of the burst (ignored by :func:`simulate_moving`, which emits from t_start_s
        to t_stop_s).
    rms_pa_at_1m : float
        rms pressure over ``duration_s`` at 1 m, Pa (1 Pa is 94 dB re 20 uPa).
    taper_s : float
        Raised-cosine fade at each end, s (impulse: the fade at its end only).
    fundamental_hz, harmonics
        For ``kind='tone'``.
    samples, samples_rate_hz
        For ``kind='recording'``: the recorded sound, shape (n,), and its sample rate, Hz.
    """

    kind: str = "noise"
    band_hz: tuple[float, float] = (200.0, 4000.0)
    duration_s: float = 0.2
    rms_pa_at_1m: float = 1.0
    taper_s: float = 0.005
    fundamental_hz: float = 500.0
    harmonics: tuple[float, ...] = (1.0,)
    samples: np.ndarray | None = field(default=None, compare=False, repr=False)
    samples_rate_hz: float = 0.0


def recorded_waveform(samples, samples_rate_hz, rms_pa_at_1m=1.0) -> Waveform:
    """A ``'recording'`` :class:`Waveform` that emits a recorded (mono) sound once, its whole
    length (no loop, no fade: ``taper_s`` 0)."""
    x = np.asarray(samples, float).ravel()
    if x.size < 2 or not np.all(np.isfinite(x)) or not float(samples_rate_hz) > 0:
        raise ValueError("a recorded waveform needs finite mono samples and a sample rate")
    return Waveform(kind="recording", duration_s=x.size / float(samples_rate_hz),
                    rms_pa_at_1m=float(rms_pa_at_1m), taper_s=0.0, samples=x,
                    samples_rate_hz=float(samples_rate_hz))


def _recorded(wf, rate_hz, n, max_hz):
    """``wf.samples`` at ``rate_hz``, below ``max_hz``, looped to ``n`` samples (Waveform)."""
    from fractions import Fraction

    from scipy.signal import resample_poly

    if wf.samples is None or not wf.samples_rate_hz > 0:
        raise ValueError("a 'recording' waveform needs samples and samples_rate_hz > 0")
    q = Fraction(float(rate_hz) / float(wf.samples_rate_hz)).limit_denominator(1000)
    y = resample_poly(np.asarray(wf.samples, float), q.numerator, q.denominator)
    m = sfft.next_fast_len(y.size, real=True)
    spec = sfft.rfft(y, m)
    spec[sfft.rfftfreq(m, 1.0 / rate_hz) >= 0.98 * max_hz] = 0.0  # below the simulator limit
    y = sfft.irfft(spec, m)[:y.size]
    lap = int(round(wf.taper_s * rate_hz))
    period = y.size - lap
    if period < 1:
        raise ValueError(f"the recording ({y.size / rate_hz:.3g} s) must be longer than "
                         f"taper_s ({wf.taper_s!r} s)")
    out = np.zeros(n + y.size)
    for k in range(0, n, period):  # the excerpt's end fade overlaps the next copy's start fade
        out[k:k + y.size] += y
    return out[:n]


@dataclass(frozen=True)
class Emission:
    """One stationary sound: ``waveform`` (a :class:`Waveform` or a tuple, summed) leaving
    ``position_m`` (3,) at ``t_emit_s`` (true time, s)."""

    position_m: np.ndarray
    t_emit_s: float
    waveform: Waveform | tuple[Waveform, ...] = Waveform()


@dataclass
class Simulation:
    """A simulated recording.

    Attributes
    ----------
    signals : ndarray, shape (N, T)
        Pressure at each mic, Pa; sample n is at the mic's clock time n / sample_rate_hz.
    arrivals_s : ndarray, shape (E, N)
        True arrival time of the direct sound of each emission (moving: of the emission at
        t_start_s, E = 1).
    recorded_arrivals_s : ndarray, shape (E, N)
        The same arrivals on each mic's clock: (t - offset) (1 + ppm 1e-6).
    image_arrivals_s : ndarray, shape (E, N) or None
        True arrival of the ground-reflected sound.
    received_rms : ndarray, shape (N,)
        rms of the direct sound as defined for the SNR (module docstring), Pa.
    noise_rms : ndarray, shape (N,)
        Standard deviation of the added white noise, Pa.
    emitted_signals : tuple of ndarray
        The emitted samples of each event (sample 0 at u = 0) at ``emitted_rate_hz``.
    probe_times_s, probe_emission_times_s, probe_positions_m
        Moving sources only: clock times (M,), the emission times heard then (N, M) and the
        source positions at those emission times (N, M, 3).
    """

    signals: np.ndarray
    sample_rate_hz: float
    sound_speed_mps: float
    wind_mps: np.ndarray
    mic_positions_m: np.ndarray
    arrivals_s: np.ndarray
    recorded_arrivals_s: np.ndarray
    image_arrivals_s: np.ndarray | None
    received_rms: np.ndarray
    noise_rms: np.ndarray
    clock_offsets_s: np.ndarray
    clock_drift_ppm: np.ndarray
    emitted_signals: tuple
    emitted_rate_hz: float
    emissions: tuple = ()
    path: object | None = None
    probe_times_s: np.ndarray | None = None
    probe_emission_times_s: np.ndarray | None = None
    probe_positions_m: np.ndarray | None = None


# ----------------------------------------------------------------------------- waveforms
def _ramp(n_ramp, n):
    """Raised-cosine rise over ``n_ramp`` samples, shape (n,)."""
    out = np.ones(n)
    if n_ramp >= 1:
        out[:n_ramp] = 0.5 - 0.5 * np.cos(np.pi * (np.arange(n_ramp) + 0.5) / n_ramp)
    return out


def _band_noise(n, rate_hz, band_hz, rng):
    """White Gaussian noise filtered to ``band_hz`` with raised-cosine edges inside the band."""
    lo, hi = band_hz
    m = sfft.next_fast_len(max(n, 8192), real=True)  # periodic noise: no wrap concern
    spec = sfft.rfft(rng.standard_normal(m))
    f = sfft.rfftfreq(m, 1.0 / rate_hz)
    w_lo = min(0.5 * lo, 0.1 * (hi - lo))
    w_hi = min(0.1 * hi, 0.1 * (hi - lo))
    rise = np.clip((f - lo) / w_lo, 0.0, 1.0) if w_lo > 0 else (f >= lo) * 1.0
    fall = np.clip((hi - f) / w_hi, 0.0, 1.0)
    gain = np.sin(0.5 * np.pi * rise) ** 2 * np.sin(0.5 * np.pi * fall) ** 2
    gain[0] = 0.0
    return sfft.irfft(spec * gain, m)[:n]


def _one_waveform(wf, rate_hz, rng, duration_s, max_hz):
    if wf.kind not in _KINDS:
        raise ValueError(f"waveform kind must be one of {_KINDS}, got {wf.kind!r}")
    n = int(round(duration_s * rate_hz))
    if n < 2:
        raise ValueError(f"waveform duration_s too short: {duration_s!r}")
    lo, hi = (float(b) for b in wf.band_hz)
    u = np.arange(n) / rate_hz
    n_taper = min(int(round(wf.taper_s * rate_hz)), n // 2)
    fade = _ramp(n_taper, n) * _ramp(n_taper, n)[::-1]
    if wf.kind == "recording":
        top = 0.0
        x = _recorded(wf, rate_hz, n, max_hz)
        fade = np.ones(n)
    elif wf.kind == "tone":
        k = np.arange(1, len(wf.harmonics) + 1)
        top = k[-1] * wf.fundamental_hz
        x = np.sum(np.asarray(wf.harmonics, float)[:, None]
                   * np.sin(2 * np.pi * wf.fundamental_hz * k[:, None] * u), axis=0)
    else:
        top = hi
        if not 0.0 <= lo < hi:
            raise ValueError(f"band_hz must satisfy 0 <= lo < hi, got {wf.band_hz!r}")
        if wf.kind == "chirp":  # linear chirp, phase 2 pi (f0 u + (f1 - f0) u^2 / (2 D))
            x = np.sin(2 * np.pi * (lo * u + (hi - lo) * u**2 / (2.0 * duration_s)))
        else:
            x = _band_noise(n, rate_hz, (lo, hi), rng)
            if wf.kind == "impulse":  # 0.5 ms attack, exponential decay to -60 dB
                fade = (_ramp(int(round(5e-4 * rate_hz)), n) * _ramp(n_taper, n)[::-1]
                        * np.exp(-np.log(1e3) * u / duration_s))
    if top >= max_hz:
        raise ValueError(f"waveform content up to {top!r} Hz must stay below {max_hz!r} Hz "
                         f"({_MAX_BAND} x the output sample rate)")
    x = x * fade
    ms = np.sum(x**2) / n
    return x * (wf.rms_pa_at_1m / np.sqrt(ms)) if ms > 0 else x


def emitted_signal(waveform, sample_rate_hz, rng, *, duration_s=None, max_hz=None):
    """Samples of the emitted sound at 1 m, Pa, shape (n,), sample 0 at u = 0.

    ``waveform`` is a :class:`Waveform` or a tuple of them (summed; each keeps its own rms).
    ``duration_s`` overrides the waveforms' own durations.  Content must stay below
    ``max_hz`` (default 0.45 ``sample_rate_hz``), else ValueError.
    """
    max_hz = _MAX_BAND * float(sample_rate_hz) if max_hz is None else float(max_hz)
    parts = waveform if isinstance(waveform, tuple | list) else (waveform,)
    durs = [duration_s or wf.duration_s for wf in parts]
    out = np.zeros(int(round(max(durs) * sample_rate_hz)))
    for wf, d in zip(parts, durs, strict=True):
        x = _one_waveform(wf, float(sample_rate_hz), rng, d, max_hz)
        out[: x.size] += x
    return out


# ----------------------------------------------------------------------------- paths
class StraightPath:
    """Constant-velocity motion p(t) = start_m + velocity_mps (t - t0_s); shapes (3,)."""

    def __init__(self, start_m, velocity_mps, t0_s=0.0):
        self.start_m = np.asarray(start_m, float).reshape(3)
        self.velocity = np.asarray(velocity_mps, float).reshape(3)
        self.t0_s = float(t0_s)

    def position_m(self, t_s):
        """Position at ``t_s`` (...), shape (..., 3)."""
        return self.start_m + self.velocity * (np.asarray(t_s, float)[..., None] - self.t0_s)

    def velocity_mps(self, t_s):
        """Velocity at ``t_s`` (...), shape (..., 3)."""
        return np.broadcast_to(self.velocity, np.shape(t_s) + (3,))

    def mirrored(self):
        """The image path below the ground plane z = 0."""
        flip = np.array([1.0, 1.0, -1.0])
        return StraightPath(self.start_m * flip, self.velocity * flip, self.t0_s)


class WaypointPath:
    """Piecewise-constant-velocity motion through ``points_m`` (K, 3) at ``times_s`` (K,).

    Before the first and after the last waypoint the source keeps the end segment's velocity.
    """

    def __init__(self, times_s, points_m):
        self.times_s = np.asarray(times_s, float)
        self.points_m = np.asarray(points_m, float)
        if (self.times_s.ndim != 1 or self.times_s.size < 2
                or self.points_m.shape != (self.times_s.size, 3)
                or np.any(np.diff(self.times_s) <= 0)):
            raise ValueError("WaypointPath needs increasing times_s (K,) and points_m (K, 3), "
                             f"got shapes {self.times_s.shape!r}, {self.points_m.shape!r}")
        self._vel = np.diff(self.points_m, axis=0) / np.diff(self.times_s)[:, None]

    def _segment(self, t_s):
        t = np.asarray(t_s, float)
        return t, np.clip(np.searchsorted(self.times_s, t, side="right") - 1, 0,
                          self.times_s.size - 2)

    def position_m(self, t_s):
        """Position at ``t_s`` (...), shape (..., 3)."""
        t, k = self._segment(t_s)
        dt = t - np.take(self.times_s, k)
        return np.take(self.points_m, k, axis=0) + np.take(self._vel, k, axis=0) * dt[..., None]

    def velocity_mps(self, t_s):
        """Velocity at ``t_s`` (...), shape (..., 3)."""
        return np.take(self._vel, self._segment(t_s)[1], axis=0)

    def mirrored(self):
        """The image path below the ground plane z = 0."""
        return WaypointPath(self.times_s, self.points_m * np.array([1.0, 1.0, -1.0]))


class AcceleratingPath:
    """Constant-acceleration motion p(t) = start_m + velocity_mps (t - t0_s)
    + acceleration_mps2 (t - t0_s)^2 / 2 (textbook kinematics); shapes (3,).

    With ``t_stop_accel_s`` the acceleration stops there and the source keeps the velocity it
    has reached (a speed change that ends).
    """

    def __init__(self, start_m, velocity_mps, acceleration_mps2, t0_s=0.0, t_stop_accel_s=None):
        self.start_m = np.asarray(start_m, float).reshape(3)
        self.velocity = np.asarray(velocity_mps, float).reshape(3)
        self.acceleration = np.asarray(acceleration_mps2, float).reshape(3)
        self.t0_s = float(t0_s)
        self.t_stop_accel_s = None if t_stop_accel_s is None else float(t_stop_accel_s)

    def _dt(self, t_s):
        dt = np.asarray(t_s, float)[..., None] - self.t0_s
        if self.t_stop_accel_s is None:
            return dt, np.zeros_like(dt)
        end = self.t_stop_accel_s - self.t0_s
        return np.minimum(dt, end), np.maximum(dt - end, 0.0)

    def position_m(self, t_s):
        """Position at ``t_s`` (...), shape (..., 3)."""
        a, b = self._dt(t_s)
        return (self.start_m + self.velocity * (a + b) + 0.5 * self.acceleration * a**2
                + self.acceleration * a * b)

    def velocity_mps(self, t_s):
        """Velocity at ``t_s`` (...), shape (..., 3)."""
        a, _ = self._dt(t_s)
        return self.velocity + self.acceleration * a

    def mirrored(self):
        """The image path below the ground plane z = 0."""
        flip = np.array([1.0, 1.0, -1.0])
        return AcceleratingPath(self.start_m * flip, self.velocity * flip,
                                self.acceleration * flip, self.t0_s, self.t_stop_accel_s)


def _dot(a, b):
    return np.einsum("...i,...i->...", a, b)


def emission_time_s(t_heard_s, mic_m, path, sound_speed_mps, wind_mps=None, *,
                    method="auto", tol_s=1e-12, max_iter=50):
    """When the sound heard at ``mic_m`` at true time ``t_heard_s`` left the moving source.

    Solves t = t_e + tau with |m - p(t_e) - w tau| = c tau (textbook kinematics).

    Parameters
    ----------
    t_heard_s : array_like, shape (...)
        True reception times, s.
    mic_m : array_like, shape (..., 3)
        Mic positions; broadcasts against ``t_heard_s``.
    path : StraightPath, WaypointPath or any object with ``position_m(t)`` and
        ``velocity_mps(t)`` returning (..., 3)
    sound_speed_mps : float
    wind_mps : array_like (3,), optional
    method : {'auto', 'closed', 'iterate'}
        'closed' (StraightPath only): the root of the quadratic
        (c^2 - |u|^2) tau^2 + 2 (d.u) tau - |d|^2 = 0 with u = v - w and d = p(t) - m.
        'iterate': Newton on tau - T(p(t - tau)) with T the still-source travel time
        (:func:`locate.physics.air.travel_time_s`), at most ``max_iter`` steps.

    Returns
    -------
    ndarray, shape broadcast(t_heard_s.shape, mic_m.shape[:-1])

    Raises
    ------
    locate.errors.ConvergenceError
        If the iteration does not settle within ``tol_s``.
    """
    c = float(sound_speed_mps)
    w = np.zeros(3) if wind_mps is None else np.asarray(wind_mps, float).reshape(3)
    mic = np.asarray(mic_m, float)
    shape = np.broadcast_shapes(np.shape(t_heard_s), mic.shape[:-1])
    t = np.broadcast_to(np.asarray(t_heard_s, float), shape)
    if method not in ("auto", "closed", "iterate"):
        raise ValueError(f"method must be 'auto', 'closed' or 'iterate', got {method!r}")
    if method == "closed" or (method == "auto" and isinstance(path, StraightPath)):
        if not isinstance(path, StraightPath):
            raise ValueError("method='closed' needs a StraightPath")
        d = path.position_m(t) - mic
        u = path.velocity - w
        a = c**2 - u @ u
        if a <= 0:
            raise ValueError(f"source speed relative to the air must be below c, got {u!r}")
        b, dd = d @ u, _dot(d, d)
        root = np.sqrt(b**2 + a * dd)
        with np.errstate(invalid="ignore", divide="ignore"):  # stable forms of the root
            tau = np.where(b >= 0, dd / (b + root), (root - b) / a)
        return t - np.where(dd > 0, tau, 0.0)
    mic = np.broadcast_to(mic, shape + (3,)).reshape(-1, 3)
    t = t.reshape(-1)
    wv = None if wind_mps is None else w
    return _iterate(t, mic, path, c, wv, None, tol_s, max_iter).reshape(shape)


def _iterate(t, mic, path, c, wind, tau, tol_s, max_iter):
    """Newton on g(tau) = tau - T(p(t - tau)) over the instants not yet settled.

    g' = 1 + grad T . v, grad T from implicit differentiation of |r - w T| = c T with
    r = m - p (as in :func:`locate.physics.air.travel_time_gradient`).  ``t`` (M,), ``mic`` (M, 3).
    """
    if tau is None:
        tau = air.travel_time_s(path.position_m(t), mic, c, wind)
    tau = np.array(tau, float)
    w = np.zeros(3) if wind is None else wind
    active = np.arange(t.size)
    for _ in range(max_iter):
        t_e = t[active] - tau[active]
        p, v, m = path.position_m(t_e), path.velocity_mps(t_e), mic[active]
        travel = air.travel_time_s(p, m, c, wind)
        u = m - p - w * travel[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            grad = -u / (u @ w + c**2 * travel)[:, None]
            step = (tau[active] - travel) / (1.0 + _dot(np.where(np.isfinite(grad), grad, 0.0),
                                                         v))
        tau[active] -= step
        active = active[~(np.abs(step) < tol_s)]
        if not active.size:
            return t - tau
    raise ConvergenceError(f"emission time did not converge to {tol_s!r} s for "
                           f"{active.size} instants (is the source slower than sound, "
                           f"c = {c!r} m/s?)")


def _dense_emission_times(t, mic, path, c, wind):
    """Emission times for a long sorted run of instants ``t`` (T,) at one mic (3,): exact
    solves every 32nd instant, a cubic spline of tau as the start, then Newton to 1e-12 s."""
    if isinstance(path, StraightPath) or t.size < 256:
        return emission_time_s(t, mic, path, c, wind)
    coarse = np.unique(np.append(t[::32], t[-1]))
    tau_c = coarse - emission_time_s(coarse, mic, path, c, wind)
    tau0 = CubicSpline(coarse, tau_c)(t)
    return _iterate(t, np.broadcast_to(mic, t.shape + (3,)), path, c, wind, tau0, 1e-12, 50)


# ----------------------------------------------------------------------------- kernels
def _kernel_table():
    """Polyphase table (P+1, 2H) of the Kaiser-windowed sinc and its phase differences."""
    offsets = np.arange(-_HALF_TAPS + 1, _HALF_TAPS + 1)
    d = np.arange(_PHASES + 1)[:, None] / _PHASES - offsets[None, :]
    x = np.clip(1.0 - (d / _HALF_TAPS) ** 2, 0.0, None)
    tab = np.sinc(d) * i0(_KAISER_BETA * np.sqrt(x)) / i0(_KAISER_BETA)
    return offsets, tab[:-1], np.diff(tab, axis=0)


_TABLE = _kernel_table()


def _interp(x, q, chunk=32768):
    """Band-limited value of samples ``x`` (M,) at fractional indices ``q`` (Q,); 0 outside."""
    offsets, tab, dtab = _TABLE
    out = np.zeros(q.size)
    inside = np.flatnonzero((q >= _HALF_TAPS) & (q < x.size - _HALF_TAPS - 1))
    for s in range(0, inside.size, chunk):
        idx = inside[s:s + chunk]
        base = np.floor(q[idx])
        ph = (q[idx] - base) * _PHASES
        p = np.minimum(ph.astype(np.intp), _PHASES - 1)
        xs = x[base.astype(np.intp)[:, None] + offsets]
        out[idx] = (np.einsum("ij,ij->i", xs, tab[p])
                    + (ph - p) * np.einsum("ij,ij->i", xs, dtab[p]))
    return out


# ----------------------------------------------------------------------------- set-up
def _setup(mic_positions_m, fs, temperature_c, relative_humidity, pressure_kpa, wind_mps,
           sound_speed_mps, clock_offsets_s, clock_drift_ppm, ground_reflection):
    mics = np.asarray(mic_positions_m, float)
    if mics.ndim != 2 or mics.shape[1] != 3 or mics.shape[0] < 1:
        raise ValueError(f"mic_positions_m must have shape (N, 3), got {mics.shape!r}")
    if not fs > 0:
        raise ValueError(f"sample_rate_hz must be positive, got {fs!r}")
    n = mics.shape[0]
    c = (float(air.sound_speed_mps(temperature_c, relative_humidity, pressure_kpa))
         if sound_speed_mps is None else float(sound_speed_mps))
    wind = np.zeros(3) if wind_mps is None else np.asarray(wind_mps, float).reshape(3)
    off = np.zeros(n) if clock_offsets_s is None else np.asarray(clock_offsets_s, float)
    ppm = np.zeros(n) if clock_drift_ppm is None else np.asarray(clock_drift_ppm, float)
    for name, v in (("clock_offsets_s", off), ("clock_drift_ppm", ppm)):
        if v.shape != (n,):
            raise ValueError(f"{name} must have shape ({n},), got {v.shape!r}")
    if ground_reflection is not None and np.any(mics[:, 2] < 0):
        raise ValueError("ground_reflection needs mics at z >= 0")
    return mics, c, wind, off, ppm


def _add_noise(signals, ms_direct, snr_db, noise_rms, rng):
    n = signals.shape[0]
    if snr_db is not None and noise_rms is not None:
        raise ValueError("give snr_db or noise_rms, not both")
    if snr_db is not None:
        sd = np.sqrt(ms_direct / 10.0 ** (np.broadcast_to(np.asarray(snr_db, float), (n,)) / 10))
    elif noise_rms is not None:
        sd = np.broadcast_to(np.asarray(noise_rms, float), (n,)).copy()
    else:
        return np.zeros(n)
    signals += sd[:, None] * rng.standard_normal(signals.shape)
    return sd


def _absorb_gain(f_hz, dist_m, temperature_c, relative_humidity, pressure_kpa):
    """ISO 9613-1 pure-tone attenuation as a gain, broadcast over f and distance."""
    alpha = air.absorption_db_per_m(f_hz, temperature_c, relative_humidity, pressure_kpa)
    return 10.0 ** (-alpha * dist_m / 20.0)


# ----------------------------------------------------------------------------- stationary
def simulate_events(mic_positions_m, events, *, sample_rate_hz=48000.0, duration_s,
                    temperature_c=20.0, relative_humidity=50.0, pressure_kpa=101.325,
                    wind_mps=None, sound_speed_mps=None, snr_db=None, noise_rms=None,
                    ground_reflection=None, absorption=True, clock_offsets_s=None,
                    clock_drift_ppm=None, rng=None, walls=()):
    """Record stationary emissions at the mics.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    events : sequence of Emission
    sample_rate_hz, duration_s : float
        The recording: T = round(duration_s * sample_rate_hz) samples per mic.
    temperature_c, relative_humidity, pressure_kpa : float
        Air for the sound speed (Cramer 1993, unless ``sound_speed_mps`` overrides it) and for
        the ISO 9613-1 absorption.
    wind_mps : array_like (3,), optional
        Uniform wind; horizontal wind keeps the image-source travel time exact.
    snr_db, noise_rms : float or (N,), optional
        Per-channel SNR as defined in the module docstring, or an absolute noise rms (Pa).
    ground_reflection : float, optional
        Reflection coefficient Q of the ground plane z = 0 (image source at (x, y, -z)).
    absorption : bool
    clock_offsets_s, clock_drift_ppm : array_like (N,), optional
        Clock faults (module docstring); drift is evaluated at the exact sample times.
    rng : numpy.random.Generator, optional
        Waveforms are drawn first (in event order), then the noise; default ``default_rng(0)``.
    walls : sequence of (point_m (3,), normal (3,), coefficient)
        Reflecting planes (a building face): the first-order image source mirrored across each
        plane (image method, textbook), heard only by mics on the source's side of it.

    Returns
    -------
    Simulation
    """
    fs = float(sample_rate_hz)
    mics, c, wind, off, ppm = _setup(mic_positions_m, fs, temperature_c, relative_humidity,
                                     pressure_kpa, wind_mps, sound_speed_mps, clock_offsets_s,
                                     clock_drift_ppm, ground_reflection)
    rng = np.random.default_rng(0) if rng is None else rng
    walls = [(np.asarray(p, float).reshape(3), np.asarray(nv, float).reshape(3)
              / np.linalg.norm(nv), float(g)) for p, nv, g in walls]
    events = tuple(events)
    n_mic, n_t = mics.shape[0], int(round(duration_s * fs))
    wv = None if wind_mps is None else wind
    emitted = [emitted_signal(ev.waveform, fs, rng) for ev in events]
    signals = np.zeros((n_mic, n_t))
    arrivals = np.zeros((len(events), n_mic))
    image_arr = np.zeros((len(events), n_mic)) if ground_reflection is not None else None
    ms = np.zeros((len(events), n_mic))
    drift = ppm * 1e-6
    for e, (ev, x) in enumerate(zip(events, emitted, strict=True)):
        src = np.asarray(ev.position_m, float).reshape(3)
        r_d = np.linalg.norm(mics - src, axis=1)
        tau_d = air.travel_time_s(src, mics, c, wv)
        arrivals[e] = ev.t_emit_s + tau_d
        lag = np.zeros(n_mic)
        if ground_reflection is not None:
            if src[2] < 0:
                raise ValueError(f"ground_reflection needs sources at z >= 0, got {src!r}")
            img = src * np.array([1.0, 1.0, -1.0])
            r_i = np.linalg.norm(mics - img, axis=1)
            lag = air.travel_time_s(img, mics, c, wv) - tau_d
            image_arr[e] = arrivals[e] + lag
        echoes = []  # (coefficient, distance (N,), lag (N,)) of each wall's image
        for point, normal, coef in walls:
            p0 = np.asarray(point, float).reshape(3)
            nv = np.asarray(normal, float).reshape(3)
            nv = nv / np.linalg.norm(nv)
            side = (src - p0) @ nv
            w_img = src - 2.0 * side * nv
            seen = np.sign((mics - p0) @ nv) == np.sign(side)
            w_lag = air.travel_time_s(w_img, mics, c, wv) - tau_d
            echoes.append((float(coef) * seen, np.linalg.norm(mics - w_img, axis=1),
                           np.where(seen, w_lag, 0.0)))
        lag_max = max([float(lag.max())] + [float(e[2].max()) for e in echoes])
        n_x = x.size + int(np.ceil(lag_max * fs))
        pad = 32 + _HALF_TAPS + int(np.ceil(np.max(np.abs(drift)) * n_x))
        n_buf = sfft.next_fast_len(n_x + 2 * pad, real=True)
        buf = np.zeros(n_buf)
        buf[pad:pad + x.size] = x
        f = sfft.rfftfreq(n_buf, 1.0 / fs)
        spec = sfft.rfft(buf)
        if n_buf % 2 == 0:
            spec[-1] = 0.0  # no Nyquist term: the interpolant is real for every delay
        g_d = (_absorb_gain(f, r_d[:, None], temperature_c, relative_humidity, pressure_kpa)
               if absorption else np.ones((1, f.size))) / r_d[:, None]
        y = spec * g_d
        energy = (np.abs(y[:, 0]) ** 2 + 2 * np.sum(np.abs(y[:, 1:]) ** 2, axis=1)) / n_buf
        ms[e] = energy / x.size  # mean square over the emission duration
        if ground_reflection is not None:
            g_i = (_absorb_gain(f, r_i[:, None], temperature_c, relative_humidity, pressure_kpa)
                   if absorption else 1.0) / r_i[:, None]
            y = y + float(ground_reflection) * spec * g_i * np.exp(-2j * np.pi * f * lag[:, None])
        for coef, r_w, w_lag in echoes:
            g_w = (_absorb_gain(f, r_w[:, None], temperature_c, relative_humidity, pressure_kpa)
                   if absorption else 1.0) / r_w[:, None]
            y = y + coef[:, None] * spec * g_w * np.exp(-2j * np.pi * f * w_lag[:, None])
        rec = (arrivals[e] - off) * (1.0 + drift)  # clock time of u = 0 at each mic
        n0 = np.floor(rec * fs).astype(np.int64) - pad
        if np.all(drift == 0):
            frac = rec * fs - np.floor(rec * fs)  # fractional delay, samples
            out = sfft.irfft(y * np.exp(-2j * np.pi * f * frac[:, None] / fs), n_buf, axis=1)
        else:
            fine = _OVERSAMPLE * sfft.irfft(y, _OVERSAMPLE * n_buf, axis=1)
            n_rec = n0[:, None] + np.arange(n_buf)
            u = n_rec / (fs * (1.0 + drift[:, None])) + off[:, None] - arrivals[e][:, None]
            q = _OVERSAMPLE * (u * fs + pad)
            out = np.stack([_interp(fine[i], q[i]) for i in range(n_mic)])
        for i in range(n_mic):
            a, b = max(n0[i], 0), min(n0[i] + n_buf, n_t)
            if b > a:
                signals[i, a:b] += out[i, a - n0[i]:b - n0[i]]
    ms_direct = ms.mean(axis=0) if len(events) else np.zeros(n_mic)
    sd = _add_noise(signals, ms_direct, snr_db, noise_rms, rng)
    return Simulation(signals, fs, c, wind, mics, arrivals, (arrivals - off) * (1 + drift),
                      image_arr, np.sqrt(ms_direct), sd, off, ppm, tuple(emitted), fs,
                      emissions=events)


# ----------------------------------------------------------------------------- moving
def _absorb_blockwise(y, dist_m, fs, temperature_c, relative_humidity, pressure_kpa,
                      hop=2048, pad=256):
    """Absorption at each block's mean distance: periodic-Hann frames of 2 hop, 50 % overlap
    (the windows sum to one), zero-phase filtered, overlap-added.  ``y``, ``dist_m``: (T,)."""
    n = y.size
    n_fr = n // hop + 2
    idx = np.arange(n_fr)[:, None] * hop + np.arange(2 * hop)
    y_pad = np.zeros((n_fr + 1) * hop)
    y_pad[hop:hop + n] = y
    d_pad = np.pad(dist_m, (hop, y_pad.size - n - hop), mode="edge")
    win = np.sin(np.pi * np.arange(2 * hop) / (2 * hop)) ** 2
    r_mean = (d_pad[idx] * win).sum(axis=1) / win.sum()
    n_fft = sfft.next_fast_len(2 * hop + 2 * pad, real=True)
    f = sfft.rfftfreq(n_fft, 1.0 / fs)
    gain = _absorb_gain(f[None, :], r_mean[:, None], temperature_c, relative_humidity,
                        pressure_kpa)
    out = np.roll(sfft.irfft(sfft.rfft(y_pad[idx] * win, n_fft, axis=1) * gain, n_fft, axis=1),
                  pad, axis=1)
    pos = idx[:, :1] + np.arange(n_fft)  # = true position + pad
    acc = np.bincount(pos.ravel(), weights=out.ravel(), minlength=pos.max() + 1)
    return acc[hop + pad:hop + pad + n]


def simulate_moving(mic_positions_m, path, waveform, *, t_start_s, t_stop_s,
                    sample_rate_hz=48000.0, duration_s=None, temperature_c=20.0,
                    relative_humidity=50.0, pressure_kpa=101.325, wind_mps=None,
                    sound_speed_mps=None, snr_db=None, noise_rms=None, ground_reflection=None,
                    absorption=True, clock_offsets_s=None, clock_drift_ppm=None,
                    probe_interval_s=0.01, rng=None):
    """Record a source that moves along ``path`` and emits ``waveform`` from t_start_s to
    t_stop_s (true emission times).

    Every output sample of every mic is evaluated at its exact emission time
    (:func:`emission_time_s`): received = s(t_e) / |m - p(t_e)|, s interpolated band-limited
    from 4x oversampled samples; absorption block-wise at the block's mean distance.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    path : StraightPath or WaypointPath (or any object with position_m, velocity_mps,
        mirrored)
    waveform : Waveform or tuple of Waveform
        Summed (e.g. broadband noise plus a harmonic tone); their ``duration_s`` is ignored.
    t_start_s, t_stop_s : float
    duration_s : float, optional
        Recording length; default until the last sound has reached every mic, + 0.1 s.
    probe_interval_s : float
        Spacing of the returned probe instants (``Simulation.probe_*``).
    Other parameters are those of :func:`simulate_events`.

    Returns
    -------
    Simulation
    """
    fs = float(sample_rate_hz)
    mics, c, wind, off, ppm = _setup(mic_positions_m, fs, temperature_c, relative_humidity,
                                     pressure_kpa, wind_mps, sound_speed_mps, clock_offsets_s,
                                     clock_drift_ppm, ground_reflection)
    if not t_stop_s > t_start_s:
        raise ValueError(f"t_stop_s must exceed t_start_s, got {t_start_s!r}, {t_stop_s!r}")
    rng = np.random.default_rng(0) if rng is None else rng
    wv = None if wind_mps is None else wind
    drift = ppm * 1e-6
    rate = _OVERSAMPLE * fs
    margin = _HALF_TAPS + 2
    src = emitted_signal(waveform, rate, rng, duration_s=t_stop_s - t_start_s,
                         max_hz=_MAX_BAND * fs)
    grid = np.concatenate([np.zeros(margin), src, np.zeros(margin)])
    t_grid0 = t_start_s - margin / rate
    paths = [(path, 1.0)]
    if ground_reflection is not None:
        paths.append((path.mirrored(), float(ground_reflection)))
    if duration_s is None:  # t_e + tau(t_e) grows with t_e: the last sound left at t_stop_s
        reach = np.max([air.travel_time_s(p.position_m(t_stop_s), mics, c, wv)
                        for p, _ in paths], axis=0)
        duration_s = float(np.max((t_stop_s + reach - off) * (1.0 + drift))) + 0.1
    n_mic, n_t = mics.shape[0], int(round(duration_s * fs))
    n = np.arange(n_t)
    signals = np.zeros((n_mic, n_t))
    ms = np.zeros(n_mic)
    for i in range(n_mic):
        t_true = n / (fs * (1.0 + drift[i])) + off[i]
        for k, (pth, gain) in enumerate(paths):
            t_e = _dense_emission_times(t_true, mics[i], pth, c, wv)
            r = np.linalg.norm(mics[i] - pth.position_m(t_e), axis=-1)
            y = _interp(grid, (t_e - t_grid0) * rate) / r
            if absorption:
                y = _absorb_blockwise(y, r, fs, temperature_c, relative_humidity, pressure_kpa)
            if k == 0:
                heard = (t_e >= t_start_s) & (t_e <= t_stop_s)
                ms[i] = np.mean(y[heard] ** 2) if np.any(heard) else 0.0
            signals[i] += gain * y
    sd = _add_noise(signals, ms, snr_db, noise_rms, rng)
    arrivals = t_start_s + air.travel_time_s(path.position_m(t_start_s), mics, c, wv)[None, :]
    image_arr = None
    if ground_reflection is not None:
        image_arr = t_start_s + air.travel_time_s(paths[1][0].position_m(t_start_s), mics, c,
                                                  wv)[None, :]
    probe = np.arange(0.0, n_t / fs, probe_interval_s)
    probe_true = probe[None, :] / (1.0 + drift[:, None]) + off[:, None]
    probe_te = emission_time_s(probe_true, mics[:, None, :], path, c, wv)
    return Simulation(signals, fs, c, wind, mics, arrivals, (arrivals - off) * (1 + drift),
                      image_arr, np.sqrt(ms), sd, off, ppm, (src,), rate, path=path,
                      probe_times_s=probe, probe_emission_times_s=probe_te,
                      probe_positions_m=path.position_m(probe_te))
