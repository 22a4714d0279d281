"""Fit one exponentially decaying sinusoid plus an offset to a window of samples.

The model is ``v(t) = c + exp(-σ·τ)·(a·cos(ωd·τ) + b·sin(ωd·τ))`` with ``τ = t - t_start``. Its
start comes from the matrix pencil method, which finds the poles of a sum of damped exponentials
directly from the samples; a variable-projection Levenberg–Marquardt refinement then iterates on the
two nonlinear parameters (σ, ωd) only, with (a, b, c) solved by linear least squares at each step.
Counting peaks or zero crossings is avoided: both are biased by noise, quantisation and the offset.

A record with many switching edges needs one fit per edge, and a general-purpose solver's fixed
cost per call would dominate; :func:`fit_rings` therefore fits many windows at once, with the matrix
pencil and every refinement step vectorised across the windows (shorter windows are padded with
zero-weight samples). :func:`fit_ring` is the single-window form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Poles kept by the matrix pencil: the ring pair, the offset and room for a slower trend and noise.
PENCIL_MODEL_ORDER = 6
#: The pencil works on at most this many samples (a start value does not need more). 72 samples
#: give a 25 × 25 Gram matrix: LAPACK's symmetric eigensolver then takes its QR-iteration path,
#: whereas larger sizes use divide and conquer with multithreaded matrix products, which stall
#: for milliseconds when other processes keep the cores busy.
PENCIL_MAX_SAMPLES = 72
#: Smallest ring amplitude, relative to the window's peak-to-peak spread, that counts as a ring.
MIN_RELATIVE_AMPLITUDE = 0.02
#: Fewest samples a window may hold for a five-parameter fit.
MIN_FIT_SAMPLES = 12
#: Refinement stops when a step changes σ and ωd by less than this (relative), or after
#: ``REFINE_MAX_STEPS`` trial steps; from a matrix-pencil start it usually needs four to six.
REFINE_STEP_TOLERANCE = 1e-9
REFINE_MAX_STEPS = 60
#: Smallest normalised Gram determinant det(G)/Π diag(G) of the (e·cos, e·sin, 1) basis: below it
#: the basis is degenerate (e.g. less than a fraction of a period in the window) and a step there
#: is rejected.
MIN_BASIS_INDEPENDENCE = 1e-10
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
    samples : uniformly spaced samples, shape (n,) or a stack of equal-length windows (..., n).
    model_order : number of exponentials M kept after the rank truncation.

    Returns
    -------
    z : discrete-time poles (``z = exp(s·Δt)``), shape (..., M).
    h : complex amplitudes such that ``samples[..., n] ≈ Σ h_k·z_k**n``, shape (..., M).

    Notes
    -----
    Y. Hua and T. K. Sarkar, "Matrix pencil method for estimating parameters of exponentially
    damped/undamped sinusoids in noise", IEEE Trans. ASSP 38(5), 1990: a Hankel matrix Y of the
    samples with pencil parameter L ≈ N/3 is decomposed by SVD, the M dominant right singular
    vectors give the shifted pair (V1, V2), and the poles are the eigenvalues of V1⁺·V2. The
    right singular vectors are taken here as the eigenvectors of the (L+1)² Gram matrix YᵀY,
    which span the same dominant subspace at a fraction of the cost of the SVD of Y.
    """
    y = np.asarray(samples, dtype=float)
    n = y.shape[-1]
    pencil = max(model_order + 1, n // 3)
    if n - pencil < model_order:
        raise RingFitError(f"{n} samples are too few for a pencil of order {model_order}")
    rows = np.lib.stride_tricks.sliding_window_view(y, pencil + 1, axis=-1)
    _, eigenvectors = np.linalg.eigh(np.swapaxes(rows, -1, -2) @ rows)  # ascending eigenvalues
    v = eigenvectors[..., -model_order:]
    z = np.linalg.eigvals(np.linalg.pinv(v[..., :-1, :]) @ v[..., 1:, :]).astype(complex)
    vandermonde = z[..., np.newaxis, :] ** np.arange(n)[:, np.newaxis]
    h = np.linalg.pinv(vandermonde) @ y[..., np.newaxis].astype(complex)
    return z, h[..., 0]


def _dominant_oscillation(z: np.ndarray, h: np.ndarray) -> list[tuple[float, float] | RingFitError]:
    """(σ, ωd) per sample of each window's largest-amplitude decaying oscillatory pole.

    ``z`` and ``h`` are (windows, M); ``h`` is relative to each window's peak-to-peak spread,
    and a pair below ``MIN_RELATIVE_AMPLITUDE`` of it is noise or a numerical artefact, not a ring.
    """
    with np.errstate(divide="ignore", invalid="ignore"):  # a pole at 0: decay +inf, no ring
        s = np.log(z)
    decay, omega = -s.real, s.imag
    usable = (omega > 0.02) & (omega < 0.9 * math.pi) & (decay > -0.05)
    amplitude = np.where(usable, 2 * np.abs(h), -np.inf)
    best = np.argmax(amplitude, axis=-1)
    rows = np.arange(z.shape[0])
    starts: list[tuple[float, float] | RingFitError] = []
    for has_ring, peak, decay_k, omega_k in zip(
        usable.any(axis=-1),
        amplitude[rows, best],
        decay[rows, best],
        omega[rows, best],
        strict=True,
    ):
        if not has_ring:
            starts.append(RingFitError("no decaying oscillation among the matrix pencil poles"))
        elif peak < MIN_RELATIVE_AMPLITUDE:
            starts.append(RingFitError("no oscillation stands out of the window's noise and trend"))
        else:
            starts.append((max(float(decay_k), 1e-6), float(omega_k)))
    return starts


def _pencil_starts(windows: list[np.ndarray]) -> list[tuple[float, float] | RingFitError]:
    """(σ, ωd) starts in units of each window's length, from the matrix pencil.

    Each window is decimated to at most ``PENCIL_MAX_SAMPLES``; windows decimated by the same
    stride go through the pencil together, each cut to the shortest of them (the windows of one
    record differ by a few samples, and a start value does not need them).
    """
    strides = [max(1, math.ceil(y.size / PENCIL_MAX_SAMPLES)) for y in windows]
    groups: dict[int, list[int]] = {}
    for k, stride in enumerate(strides):
        groups.setdefault(stride, []).append(k)
    starts: list[tuple[float, float] | RingFitError] = [RingFitError("")] * len(windows)
    for stride, members in groups.items():
        length = min(-(-windows[k].size // stride) for k in members)
        stack = np.stack([windows[k][::stride][:length] for k in members])
        try:
            found = _dominant_oscillation(*matrix_pencil_poles(stack))
        except RingFitError as exc:
            found = [exc] * len(members)
        for k, start in zip(members, found, strict=True):
            if isinstance(start, tuple):
                scale = windows[k].size / stride  # per decimated sample → per window length
                start = (start[0] * scale, start[1] * scale)
            starts[k] = start
    return starts


@dataclass
class _Projections:
    """Best linear parts at one (σ, ωd) per window, and the Gauss–Newton system there."""

    ok: np.ndarray  # False where the basis is degenerate
    linear: np.ndarray  # (windows, 3): a, b, c
    cost: np.ndarray  # sum of squared weighted residuals
    normal: np.ndarray  # (windows, 2, 2): JᵀJ
    gradient: np.ndarray  # (windows, 2): Jᵀr


class _VarPro:
    """Variable projection of the ring model on a stack of windows (Golub & Pereyra 1973).

    For fixed (σ, ωd) the weighted basis rows B = w·(e·cos, e·sin, 1), e = exp(−στ), give the
    linear coefficients c = G⁻¹·B·y with G = B·Bᵀ, and the residual r = Bᵀc − y = −P·y, where P
    projects onto the complement of the basis. Kaufman's Jacobian (L. Kaufman, "A variable
    projection method for solving separable nonlinear least squares problems", BIT 15, 1975) is
    J = P·(∂Bᵀ/∂θ)·c; both its columns combine U = τ·w·e·cos and V = τ·w·e·sin:
    Jσ = −(a·PU + b·PV) and Jω = b·PU − a·PV. So JᵀJ, Jᵀr and the cost follow from the inner
    products after projection, (PM)ᵀ·PM = MᵀM − (BM)ᵀ·G⁻¹·(BM) for M = (y, U, V): one 6×6 Gram
    matrix of the rows (B, y, U, V) per window and step, and no n × 2 Jacobian.
    """

    def __init__(self, ys: list[np.ndarray], ws: list[np.ndarray]) -> None:
        longest = max(y.size for y in ys)
        self.tau = np.zeros((len(ys), longest))
        self.w = np.zeros((len(ys), longest))
        self.y_w = np.zeros((len(ys), longest))
        self.size = np.array([y.size for y in ys], dtype=float)
        for k, (y, w) in enumerate(zip(ys, ws, strict=True)):
            self.tau[k, : y.size] = np.arange(y.size) / y.size
            self.w[k, : y.size] = w
            self.y_w[k, : y.size] = y * w

    def _basis(self, index: np.ndarray, decay: np.ndarray, omega: np.ndarray) -> np.ndarray:
        """Rows (w·e·cos, w·e·sin, w, w·y, τ·w·e·cos, τ·w·e·sin) of the windows ``index``.

        e·cos and e·sin are the real and imaginary parts of exp((−σ + jωd)·τ), which on the
        uniform grid τ = m/n is the running product of one complex factor: far cheaper than
        exp, cos and sin of every sample, with a rounding error of order m·ε.
        """
        tau, w = self.tau[index], self.w[index]
        rows = np.empty((index.size, 6, tau.shape[1]))
        rows[:, 2] = w
        rows[:, 3] = self.y_w[index]
        with np.errstate(over="ignore", invalid="ignore"):  # a wild trial step: rejected later
            powers = np.empty(tau.shape, dtype=complex)
            powers[:] = np.exp((-decay + 1j * omega) / self.size[index])[:, None]
            powers[:, 0] = 1.0
            np.cumprod(powers, axis=1, out=powers)
            np.multiply(powers.real, w, out=rows[:, 0])
            np.multiply(powers.imag, w, out=rows[:, 1])
            np.multiply(rows[:, 0], tau, out=rows[:, 4])
            np.multiply(rows[:, 1], tau, out=rows[:, 5])
        return rows

    def project(self, index: np.ndarray, decay: np.ndarray, omega: np.ndarray) -> _Projections:
        """Linear coefficients, cost and Gauss–Newton system of the windows ``index``."""
        rows = self._basis(index, decay, omega)
        with np.errstate(over="ignore", invalid="ignore"):
            gram = rows @ np.swapaxes(rows, 1, 2)
            basis_gram = gram[:, :3, :3]
            scale = np.prod(np.diagonal(basis_gram, axis1=1, axis2=2), axis=1)
            ok = np.isfinite(gram).all(axis=(1, 2))
            ok[ok] = np.linalg.det(basis_gram[ok]) > MIN_BASIS_INDEPENDENCE * scale[ok]
        solved = np.zeros((index.size, 3, 3))
        solved[ok] = np.linalg.solve(basis_gram[ok], gram[ok, :3, 3:])  # G⁻¹·B·(y, U, V)
        projected = gram[:, 3:, 3:] - np.swapaxes(gram[:, :3, 3:], 1, 2) @ solved
        a, b = solved[:, 0, 0], solved[:, 1, 0]
        mix = np.stack([np.stack([-a, b], -1), np.stack([-b, -a], -1)], -2)  # J = P·(U, V)·mix
        mix_t = np.swapaxes(mix, 1, 2)
        return _Projections(
            ok=ok,
            linear=solved[:, :, 0],
            cost=np.where(ok, projected[:, 0, 0], np.inf),
            normal=mix_t @ projected[:, 1:, 1:] @ mix,
            gradient=-(mix_t @ projected[:, 1:, :1])[:, :, 0],
        )

    def residual_cost(self, decay: np.ndarray, omega: np.ndarray, linear: np.ndarray) -> np.ndarray:
        """Sum of squared weighted residuals, computed from the residuals themselves."""
        rows = self._basis(np.arange(decay.size), decay, omega)
        model = np.einsum("kj,kjn->kn", linear, rows[:, :3])
        return np.sum((model - rows[:, 3]) ** 2, axis=1)

    def refine(self, decay: np.ndarray, omega: np.ndarray) -> _Projections:
        """Least-squares fits from starts (σ, ωd): Levenberg–Marquardt on (σ, ωd) per window.

        The step solves (JᵀJ + λ·diag(JᵀJ))·δ = −Jᵀr (Marquardt 1963, with the diagonal scaling
        of Moré 1978); each window's λ shrinks after a step that lowers its cost and grows after
        one that does not. Windows drop out of the batch once a step is below
        ``REFINE_STEP_TOLERANCE``. ``decay`` and ``omega`` are updated in place.
        """
        best = self.project(np.arange(decay.size), decay, omega)
        damping = np.full(decay.size, LM_INITIAL_DAMPING)
        active = best.ok.copy()
        for _ in range(REFINE_MAX_STEPS):
            index = np.flatnonzero(active)
            if index.size == 0:
                break
            normal, gradient = best.normal[index], best.gradient[index]
            p = normal[:, 0, 0] * (1 + damping[index])
            r = normal[:, 1, 1] * (1 + damping[index])
            q = normal[:, 0, 1]
            with np.errstate(divide="ignore", invalid="ignore"):
                det = p * r - q * q
                step_decay = -(r * gradient[:, 0] - q * gradient[:, 1]) / det
                step_omega = -(p * gradient[:, 1] - q * gradient[:, 0]) / det
            trial = self.project(index, decay[index] + step_decay, omega[index] + step_omega)
            accept = trial.cost <= best.cost[index]  # False for NaN and for a degenerate basis
            taken = index[accept]
            decay[taken] += step_decay[accept]
            omega[taken] += step_omega[accept]
            for name in ("ok", "linear", "cost", "normal", "gradient"):
                getattr(best, name)[taken] = getattr(trial, name)[accept]
            damping[index] *= np.where(accept, LM_DECREASE, LM_INCREASE)
            # A step below the tolerance ends the search whether or not it lowered the cost: at
            # the minimum, rounding decides the comparison.
            converged = (np.abs(step_omega) <= REFINE_STEP_TOLERANCE * np.abs(omega[index])) & (
                np.abs(step_decay)
                <= REFINE_STEP_TOLERANCE * (np.abs(decay[index]) + np.abs(omega[index]))
            )
            active[index[converged | (damping[index] > LM_MAX_DAMPING)]] = False
        return best


@dataclass(frozen=True)
class RingWindow:
    """One window for :func:`fit_rings`: uniformly spaced samples starting at ``t_start_s``.

    ``weights`` (0–1 per sample, 0 excludes a sample, e.g. a clipped one) and ``start`` (an
    earlier fit of the same ring whose decay and frequency replace the matrix-pencil start) are
    optional.
    """

    volts: np.ndarray
    sample_interval_s: float
    t_start_s: float = 0.0
    weights: np.ndarray | None = None
    start: RingFit | None = None


def fit_rings(windows: list[RingWindow], *, refine: bool = True) -> list[RingFit | RingFitError]:
    """Fit ``c + exp(-στ)·(a·cos ωdτ + b·sin ωdτ)`` to each window, vectorised across windows.

    Parameters
    ----------
    windows : the windows to fit (see :class:`RingWindow`).
    refine : False returns the start (with its least-squares a, b, c) unrefined.

    Returns
    -------
    One entry per window: its RingFit, or the RingFitError that says why it has none (too short,
    no decaying oscillation).

    Notes
    -----
    The start is the dominant oscillatory pole of the matrix pencil (Hua & Sarkar 1990) on at most
    ``PENCIL_MAX_SAMPLES`` samples. The refinement is variable projection (Golub & Pereyra 1973,
    Kaufman 1975): (a, b, c) are solved by linear least squares for each (σ, ωd), and only
    (σ, ωd) are iterated, by Levenberg–Marquardt (Marquardt 1963, Moré 1978). Time is scaled to
    the window length and voltage to the window's spread so that the problem is well conditioned
    whatever the units.
    """
    results: list[RingFit | RingFitError] = [RingFitError("")] * len(windows)
    members: list[int] = []
    ys: list[np.ndarray] = []
    ws: list[np.ndarray] = []
    levels: list[tuple[float, float]] = []  # (centre, scale) of each window's volts
    for k, window in enumerate(windows):
        y_raw = np.asarray(window.volts, dtype=float)
        if y_raw.size < MIN_FIT_SAMPLES:
            results[k] = RingFitError(
                f"a window of {y_raw.size} samples is too short for a ring fit"
            )
            continue
        centre = float(np.mean(y_raw))
        scale = float(np.ptp(y_raw)) or 1.0
        members.append(k)
        ys.append((y_raw - centre) / scale)
        ws.append(
            np.ones(y_raw.size) if window.weights is None else np.asarray(window.weights, float)
        )
        levels.append((centre, scale))

    need_pencil = [j for j, k in enumerate(members) if windows[k].start is None]
    pencil = dict(zip(need_pencil, _pencil_starts([ys[j] for j in need_pencil]), strict=True))
    starts = []
    for j, k in enumerate(members):
        start = windows[k].start
        if start is None:
            starts.append(pencil[j])
        else:
            per_unit = ys[j].size * windows[k].sample_interval_s
            starts.append(
                (start.decay_rate_per_s * per_unit, start.angular_frequency_rad_s * per_unit)
            )
    for j, start in enumerate(starts):
        if isinstance(start, RingFitError):
            results[members[j]] = start
    fitted = [j for j, start in enumerate(starts) if not isinstance(start, RingFitError)]
    if not fitted:
        return results

    varpro = _VarPro([ys[j] for j in fitted], [ws[j] for j in fitted])
    decay = np.array([starts[j][0] for j in fitted])
    omega = np.array([starts[j][1] for j in fitted])
    if refine:
        fit = varpro.refine(decay, omega)
    else:
        fit = varpro.project(np.arange(decay.size), decay, omega)
    cost = varpro.residual_cost(decay, omega, fit.linear)
    for i, j in enumerate(fitted):
        window = windows[members[j]]
        results[members[j]] = _ring_fit(
            window,
            ys[j],
            ws[j],
            levels[j],
            (float(decay[i]), float(omega[i]), *(float(x) for x in fit.linear[i])),
            float(cost[i]) if fit.ok[i] else math.nan,
        )
    return results


def _ring_fit(
    window: RingWindow,
    y: np.ndarray,
    w: np.ndarray,
    level: tuple[float, float],
    params: tuple[float, float, float, float, float],
    cost: float,
) -> RingFit | RingFitError:
    """The RingFit in SI units from the parameters in window units, or why it is not a ring."""
    decay, omega, a, b, c = params
    if omega < 0:
        omega, b = -omega, -b
    if not (math.isfinite(cost) and decay > 0 and 0 < omega < math.pi * y.size):
        return RingFitError("the fitted ring is not a decaying oscillation")
    w2 = w * w
    y_mean = float(w2 @ y) / float(np.sum(w2))
    ss_tot = float(w2 @ (y - y_mean) ** 2) or 1.0
    seconds_per_unit = y.size * window.sample_interval_s
    centre, scale = level
    return RingFit(
        t_start_s=window.t_start_s,
        amplitude_v=math.hypot(a, b) * scale,
        phase_rad=math.atan2(-b, a),
        decay_rate_per_s=decay / seconds_per_unit,
        angular_frequency_rad_s=omega / seconds_per_unit,
        offset_v=c * scale + centre,
        fit_quality=min(1.0, max(0.0, 1.0 - cost / ss_tot)),
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
    """Fit ``c + exp(-στ)·(a·cos ωdτ + b·sin ωdτ)`` to one window starting at ``t_start_s``.

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
    The single-window form of :func:`fit_rings`, which describes the method.
    """
    window = RingWindow(volts, sample_interval_s, t_start_s, weights, start)
    result = fit_rings([window], refine=refine)[0]
    if isinstance(result, RingFitError):
        raise result
    return result
