"""Fit one exponentially decaying sinusoid plus an offset to a window of samples.

The model is ``v(t) = c + exp(-σ·τ)·(a·cos(ωd·τ) + b·sin(ωd·τ))`` with ``τ = t - t_start``. Its
start comes from the matrix pencil method, which finds the poles of a sum of damped exponentials
directly from the samples; a variable-projection Levenberg–Marquardt refinement then iterates on the
two nonlinear parameters (σ, ωd) only, with (a, b, c) solved by linear least squares at each step.
Counting peaks or zero crossings is avoided: both are biased by noise, quantisation and the offset.

The refinement is written with numpy on the short, decimated window: a general-purpose solver's
fixed cost per call would dominate an analysis that fits one ring per switching edge.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Poles kept by the matrix pencil: the ring pair, the offset and room for a slower trend and noise.
PENCIL_MODEL_ORDER = 6
#: The pencil works on at most this many samples (a start value does not need more).
PENCIL_MAX_SAMPLES = 96
#: Smallest ring amplitude, relative to the window's peak-to-peak spread, that counts as a ring.
MIN_RELATIVE_AMPLITUDE = 0.02
#: Fewest samples a window may hold for a five-parameter fit.
MIN_FIT_SAMPLES = 12
#: Refinement stops when a step changes σ and ωd by less than this (relative), or after
#: ``REFINE_MAX_ITERATIONS``; from a matrix-pencil start it usually needs three to six.
REFINE_STEP_TOLERANCE = 1e-9
REFINE_MAX_ITERATIONS = 40
#: Levenberg–Marquardt damping: start, and the factors applied after a good and a rejected step.
LM_INITIAL_DAMPING = 1e-3
LM_DECREASE, LM_INCREASE, LM_MAX_DAMPING = 1 / 3, 4.0, 1e12


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
    vectors give the shifted pair (V1, V2), and the poles are the eigenvalues of V1⁺·V2. The
    right singular vectors are taken here as the eigenvectors of the (L+1)² Gram matrix YᵀY,
    which holds the same dominant subspace at a fraction of the cost of the Hankel matrix's SVD.
    """
    y = np.asarray(samples, dtype=float)
    n = y.size
    pencil = max(model_order + 1, n // 3)
    if n - pencil < model_order:
        raise RingFitError(f"{n} samples are too few for a pencil of order {model_order}")
    rows = np.lib.stride_tricks.sliding_window_view(y, pencil + 1)
    _, eigenvectors = np.linalg.eigh(rows.T @ rows)  # eigenvalues in ascending order
    v = eigenvectors[:, -model_order:]
    v1 = v[:-1]
    z = np.linalg.eigvals(np.linalg.solve(v1.T @ v1, v1.T @ v[1:]))  # V1⁺·V2, V1 full rank
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


@dataclass(frozen=True)
class _Projection:
    """The best linear part at one (σ, ωd) and the Gauss–Newton system for (σ, ωd) there."""

    decay: float
    omega: float
    linear: np.ndarray  # (a, b, c)
    cost: float  # sum of squared weighted residuals
    normal: np.ndarray  # JᵀJ, 2×2
    gradient: np.ndarray  # Jᵀr, 2


class _VarPro:
    """Variable projection of the ring model on one window (Golub & Pereyra 1973).

    For fixed (σ, ωd) the weighted basis rows B = w·(e·cos, e·sin, 1), e = exp(−στ), give the
    linear coefficients c = G⁻¹·B·y with G = B·Bᵀ, and the residual r = Bᵀc − y = −P·y, where P
    projects onto the complement of the basis. Kaufman's Jacobian (Kaufman 1975) is
    J = P·(∂Bᵀ/∂θ)·c; both of its columns are combinations of U = τ·w·e·cos and V = τ·w·e·sin:
    Jσ = −(a·PU + b·PV) and Jω = b·PU − a·PV. So JᵀJ, Jᵀr and the cost follow from the inner
    products of (y, U, V) after projection, PMᵀ·PM = MᵀM − (BM)ᵀ·G⁻¹·(BM): one 6×6 Gram matrix of
    the rows (B, y, U, V) per step, with no n × 2 Jacobian formed.
    """

    def __init__(self, tau: np.ndarray, y: np.ndarray, w: np.ndarray) -> None:
        self.tau = tau
        self.w = w
        self.rows = np.empty((6, tau.size))
        self.rows[2] = w
        self.rows[3] = y * w

    def project(self, decay: float, omega: float) -> _Projection:
        """Linear coefficients, cost and Gauss–Newton system at (σ, ωd)."""
        rows, tau = self.rows, self.tau
        envelope_w = np.exp(-decay * tau) * self.w
        phase = omega * tau
        np.multiply(envelope_w, np.cos(phase), out=rows[0])
        np.multiply(envelope_w, np.sin(phase), out=rows[1])
        np.multiply(rows[0], tau, out=rows[4])
        np.multiply(rows[1], tau, out=rows[5])
        gram = rows @ rows.T
        solved = np.linalg.solve(gram[:3, :3], gram[:3, 3:])  # G⁻¹·B·(y, U, V)
        projected = gram[3:, 3:] - gram[:3, 3:].T @ solved  # (PM)ᵀ·PM for M = (y, U, V)
        a, b = solved[0, 0], solved[1, 0]
        mix = np.array([[-a, b], [-b, -a]])  # J = P·(U, V)·mix
        return _Projection(
            decay=decay,
            omega=omega,
            linear=solved[:, 0].copy(),
            cost=float(projected[0, 0]),
            normal=mix.T @ projected[1:, 1:] @ mix,
            gradient=-(mix.T @ projected[1:, 0]),
        )


def _refine(varpro: _VarPro, decay: float, omega: float) -> _Projection:
    """Least-squares (σ, ωd, a, b, c) from a start (σ, ωd): Levenberg–Marquardt on (σ, ωd).

    The step solves (JᵀJ + λ·diag(JᵀJ))·δ = −Jᵀr (Marquardt 1963; the diagonal scaling as in
    Moré 1978); λ shrinks after a step that lowers the cost and grows until one does.
    """
    best = varpro.project(decay, omega)
    damping = LM_INITIAL_DAMPING
    for _ in range(REFINE_MAX_ITERATIONS):
        while True:
            lhs = best.normal + damping * np.diag(np.diag(best.normal))
            try:
                step = np.linalg.solve(lhs, -best.gradient)
                trial = varpro.project(best.decay + step[0], best.omega + step[1])
            except np.linalg.LinAlgError:  # a degenerate basis: treat as a rejected step
                trial = None
            if trial is not None and trial.cost <= best.cost:  # False for a NaN cost
                break
            damping *= LM_INCREASE
            if damping > LM_MAX_DAMPING:
                return best
        damping *= LM_DECREASE
        best = trial
        if abs(step[1]) <= REFINE_STEP_TOLERANCE * abs(best.omega) and abs(
            step[0]
        ) <= REFINE_STEP_TOLERANCE * (abs(best.decay) + abs(best.omega)):
            break
    return best


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
    refine : False returns the matrix-pencil start (with its least-squares a, b, c) unrefined.
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
    ``PENCIL_MAX_SAMPLES`` samples. The refinement is variable projection (Golub & Pereyra 1973,
    Kaufman 1975): (a, b, c) are solved by linear least squares for each (σ, ωd), and only
    (σ, ωd) are iterated, by Levenberg–Marquardt (Marquardt 1963, Moré 1978).
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

    varpro = _VarPro(tau, y, w)
    try:
        fit = _refine(varpro, decay0, omega0) if refine else varpro.project(decay0, omega0)
    except np.linalg.LinAlgError:
        raise RingFitError("the start values give a degenerate model basis") from None
    a, b, c = (float(v) for v in fit.linear)
    decay, omega = fit.decay, fit.omega
    if omega < 0:
        omega, b = -omega, -b
    if not (decay > 0 and 0 < omega < math.pi * duration):
        raise RingFitError("the fitted ring is not a decaying oscillation")
    w2 = w * w
    y_mean = float(w2 @ y) / float(np.sum(w2))
    ss_tot = float(w2 @ (y - y_mean) ** 2) or 1.0
    return RingFit(
        t_start_s=t_start_s,
        amplitude_v=math.hypot(a, b) * scale,
        phase_rad=math.atan2(-b, a),
        decay_rate_per_s=decay / seconds_per_unit,
        angular_frequency_rad_s=omega / seconds_per_unit,
        offset_v=c * scale + centre,
        fit_quality=min(1.0, max(0.0, 1.0 - fit.cost / ss_tot)),
    )
