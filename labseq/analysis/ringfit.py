"""Fit one exponentially decaying sinusoid plus an offset to a window of samples.

The model is ``v(t) = c + exp(-σ·τ)·(a·cos(ωd·τ) + b·sin(ωd·τ))`` with ``τ = t - t_start``. Its
start comes from the matrix pencil method, which finds the poles of a sum of damped exponentials
directly from the samples; least squares then refines all five parameters. Counting peaks or zero
crossings is avoided: both are biased by noise, quantisation and the offset.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

#: Poles kept by the matrix pencil: the ring pair, the offset and room for a slower trend and noise.
PENCIL_MODEL_ORDER = 6
#: The pencil works on at most this many samples (a start value does not need more).
PENCIL_MAX_SAMPLES = 96
#: Smallest ring amplitude, relative to the window's peak-to-peak spread, that counts as a ring.
MIN_RELATIVE_AMPLITUDE = 0.02
#: Fewest samples a window may hold for a five-parameter fit.
MIN_FIT_SAMPLES = 12


class RingFitError(ValueError):
    """The window holds no decaying oscillation that the model can describe."""


@dataclass(frozen=True)
class RingFit:
    """A fitted decaying sinusoid; times in seconds, voltages in volts.

    Attributes
    ----------
    t_start_s : time origin τ = 0 of the model (the first sample of the window).
    amplitude_v : envelope at ``t_start_s``.
    phase_rad : phase at ``t_start_s`` (the model is ``A·exp(-σ·τ)·cos(ωd·τ + φ)``).
    decay_rate_per_s : σ.
    angular_frequency_rad_s : ωd, the damped angular frequency.
    offset_v : c, the level the ring decays towards.
    fit_quality : coefficient of determination R² over the fitted samples, clipped to 0–1.
    """

    t_start_s: float
    amplitude_v: float
    phase_rad: float
    decay_rate_per_s: float
    angular_frequency_rad_s: float
    offset_v: float
    fit_quality: float

    @property
    def frequency_hz(self) -> float:
        """Damped ring frequency fd = ωd / 2π."""
        return self.angular_frequency_rad_s / (2 * math.pi)

    @property
    def damping_ratio(self) -> float:
        """ζ = σ / √(σ² + ωd²), from the pole s = -σ ± jωd of a second-order system."""
        return self.decay_rate_per_s / math.hypot(
            self.decay_rate_per_s, self.angular_frequency_rad_s
        )

    @property
    def q_factor(self) -> float:
        """Q = 1 / (2ζ)."""
        return 1.0 / (2.0 * self.damping_ratio)

    def time_envelope_below_s(self, level_v: float) -> float:
        """Instant after which the envelope stays below ``level_v`` (at least ``t_start_s``)."""
        if level_v <= 0:
            return math.inf
        ratio = abs(self.amplitude_v) / level_v
        return self.t_start_s + (math.log(ratio) / self.decay_rate_per_s if ratio > 1 else 0.0)

    def evaluate(self, t_s: np.ndarray) -> np.ndarray:
        """Model voltage at the times ``t_s``."""
        tau = np.asarray(t_s, dtype=float) - self.t_start_s
        return self.offset_v + self.amplitude_v * np.exp(-self.decay_rate_per_s * tau) * np.cos(
            self.angular_frequency_rad_s * tau + self.phase_rad
        )

    def flipped(self) -> RingFit:
        """The same fit for the record multiplied by -1 (used for negative-going nodes)."""
        return RingFit(
            self.t_start_s,
            -self.amplitude_v,
            self.phase_rad,
            self.decay_rate_per_s,
            self.angular_frequency_rad_s,
            -self.offset_v,
            self.fit_quality,
        )


def matrix_pencil_poles(
    samples: np.ndarray, model_order: int = PENCIL_MODEL_ORDER
) -> tuple[np.ndarray, np.ndarray]:
    """Poles and complex amplitudes of a sum of damped exponentials, by the matrix pencil method.

    Parameters
    ----------
    samples : 1-D array of uniformly spaced samples.
    model_order : number of exponentials M kept after the SVD truncation.

    Returns
    -------
    z : discrete-time poles (``z = exp(s·Δt)``), shape (M,).
    h : complex amplitudes such that ``samples[n] ≈ Σ h_k·z_k**n``.

    Notes
    -----
    Y. Hua and T. K. Sarkar, "Matrix pencil method for estimating parameters of exponentially
    damped/undamped sinusoids in noise", IEEE Trans. ASSP 38(5), 1990: a Hankel matrix of the
    samples with pencil parameter L ≈ N/3 is decomposed by SVD, the M dominant right singular
    vectors give the shifted pair (V1, V2), and the poles are the eigenvalues of V1⁺·V2.
    """
    y = np.asarray(samples, dtype=float)
    n = y.size
    pencil = max(model_order + 1, n // 3)
    if n - pencil < model_order:
        raise RingFitError(f"{n} samples are too few for a pencil of order {model_order}")
    rows = np.lib.stride_tricks.sliding_window_view(y, pencil + 1)
    _, _, vh = np.linalg.svd(rows, full_matrices=False)
    v = vh[:model_order].conj().T
    z = np.linalg.eigvals(np.linalg.pinv(v[:-1]) @ v[1:])
    vandermonde = z[np.newaxis, :] ** np.arange(n)[:, np.newaxis]
    h, *_ = np.linalg.lstsq(vandermonde, y.astype(complex), rcond=None)
    return z, h


def _dominant_oscillation(z: np.ndarray, h: np.ndarray) -> tuple[float, float]:
    """(σ, ωd) per sample of the largest-amplitude decaying oscillatory pole, in rad/sample.

    ``h`` is relative to the window's peak-to-peak spread; a pair below
    ``MIN_RELATIVE_AMPLITUDE`` of it is noise or a numerical artefact, not a ring.
    """
    with np.errstate(divide="ignore"):  # a pole at 0 is a decay of +inf, not oscillatory
        s = np.log(z)
    decay, omega = -s.real, s.imag
    usable = (omega > 0.02) & (omega < 0.9 * math.pi) & (decay > -0.05)
    if not np.any(usable):
        raise RingFitError("no decaying oscillation among the matrix pencil poles")
    amplitude = np.where(usable, 2 * np.abs(h), -np.inf)
    best = int(np.argmax(amplitude))
    if amplitude[best] < MIN_RELATIVE_AMPLITUDE:
        raise RingFitError("no oscillation stands out of the window's noise and trend")
    return max(float(decay[best]), 1e-6), float(omega[best])


def _model_columns(tau: np.ndarray, decay: float, omega: float) -> np.ndarray:
    """Columns of the model that is linear in (a, b, c) for fixed (σ, ωd)."""
    envelope = np.exp(-decay * tau)
    return np.stack(
        [envelope * np.cos(omega * tau), envelope * np.sin(omega * tau), np.ones_like(tau)], 1
    )


def fit_ring(
    volts: np.ndarray,
    sample_interval_s: float,
    t_start_s: float = 0.0,
    *,
    weights: np.ndarray | None = None,
    refine: bool = True,
    start: RingFit | None = None,
) -> RingFit:
    """Fit ``c + exp(-στ)·(a·cos ωdτ + b·sin ωdτ)`` to a window starting at ``t_start_s``.

    Parameters
    ----------
    volts : samples of the window, uniformly spaced by ``sample_interval_s``.
    sample_interval_s : spacing of ``volts`` (after any decimation by the caller).
    t_start_s : time of ``volts[0]``.
    weights : optional 0–1 weight per sample (0 excludes a sample, e.g. a clipped one).
    refine : False returns the matrix-pencil start without least-squares refinement.
    start : an earlier fit of the same ring (e.g. on a shorter window) whose decay rate and
        frequency replace the matrix-pencil start.

    Returns
    -------
    RingFit

    Raises
    ------
    RingFitError
        When the window is too short or holds no decaying oscillation.

    Notes
    -----
    The start is the dominant oscillatory pole of the matrix pencil (Hua & Sarkar 1990) on at most
    ``PENCIL_MAX_SAMPLES`` samples; (a, b, c) for that pole come from linear least squares
    (the variable-projection idea of Golub & Pereyra 1973); all five parameters are then refined
    by Levenberg–Marquardt (``scipy.optimize.least_squares``, Moré 1978) with an analytic Jacobian.
    Time is scaled to the window length and voltage to the window's spread so that the problem is
    well conditioned whatever the units.
    """
    y_raw = np.asarray(volts, dtype=float)
    n = y_raw.size
    if n < MIN_FIT_SAMPLES:
        raise RingFitError(f"a window of {n} samples is too short for a ring fit")
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    centre = float(np.mean(y_raw))
    scale = float(np.ptp(y_raw)) or 1.0
    y = (y_raw - centre) / scale
    duration = float(n)  # model time unit: the window length, in samples
    tau = np.arange(n) / duration

    seconds_per_unit = duration * sample_interval_s
    if start is None:
        stride = max(1, math.ceil(n / PENCIL_MAX_SAMPLES))
        z, h = matrix_pencil_poles(y[::stride])
        decay_per_sample, omega_per_sample = _dominant_oscillation(z, h)
        decay0 = decay_per_sample / stride * duration
        omega0 = omega_per_sample / stride * duration
    else:
        decay0 = start.decay_rate_per_s * seconds_per_unit
        omega0 = start.angular_frequency_rad_s * seconds_per_unit

    columns = _model_columns(tau, decay0, omega0)
    linear, *_ = np.linalg.lstsq(columns * w[:, None], y * w, rcond=None)
    params = np.array([*linear, decay0, omega0])

    if refine:

        def residual(p: np.ndarray) -> np.ndarray:
            return (_model_columns(tau, p[3], p[4]) @ p[:3] - y) * w

        def jacobian(p: np.ndarray) -> np.ndarray:
            a, b, _, decay, omega = p
            env = np.exp(-decay * tau)
            cos, sin = np.cos(omega * tau), np.sin(omega * tau)
            ring = env * (a * cos + b * sin)
            return (
                np.stack(
                    [
                        env * cos,
                        env * sin,
                        np.ones(n),
                        -tau * ring,
                        tau * env * (b * cos - a * sin),
                    ],
                    1,
                )
                * w[:, None]
            )

        result = least_squares(residual, params, jac=jacobian, method="lm", xtol=1e-10)
        if result.success and np.all(np.isfinite(result.x)):
            params = result.x

    a, b, c, decay, omega = (float(v) for v in params)
    if omega < 0:
        omega, b = -omega, -b
    if not (decay > 0 and 0 < omega < math.pi * duration):
        raise RingFitError("the fitted ring is not a decaying oscillation")
    fitted = _model_columns(tau, decay, omega) @ np.array([a, b, c])
    ss_res = float(np.sum(w * (y - fitted) ** 2))
    y_mean = float(np.sum(w * y) / np.sum(w))
    ss_tot = float(np.sum(w * (y - y_mean) ** 2)) or 1.0
    return RingFit(
        t_start_s=t_start_s,
        amplitude_v=math.hypot(a, b) * scale,
        phase_rad=math.atan2(-b, a),
        decay_rate_per_s=decay / seconds_per_unit,
        angular_frequency_rad_s=omega / seconds_per_unit,
        offset_v=c * scale + centre,
        fit_quality=min(1.0, max(0.0, 1.0 - ss_res / ss_tot)),
    )
