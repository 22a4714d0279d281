"""Fit the free response of a switch node after an edge: ring, snubber-branch pole, plateau.

The node L — Cpar ∥ (Rs + Cs) has a complex pole pair (the ring) and, with an RC damper, a real
pole (the Rs–Cs branch). Its free response is therefore

    v(τ) = c + exp(−σ·τ)·(a·cos ωd·τ + b·sin ωd·τ) + d·exp(−ρ·τ),   τ = t − t_start,

and a sinusoid-only model counts the branch's slow decay as ring damping: it reads a Q ≈ 1
damper's ζ tens of percent high. The model order is chosen from the data, not assumed: each window
is fitted as a ring alone and as a ring plus a real pole, and, when the ring looks heavily damped,
also as one or two real poles with no ring; the Bayesian information criterion (Schwarz, "Estimating
the dimension of a model", Ann. Statist. 6(2), 1978) picks among them. When a model without a ring
wins, the window holds "no ring": :class:`NoRingError` carries the real pole's decay instead of a
meaningless ζ and frequency.

Each fit starts from the matrix pencil (Hua & Sarkar 1990), which finds the poles of a sum of
damped exponentials directly from the samples (order 6 here, room for the pair, the real pole, the
plateau and noise); a variable-projection Levenberg–Marquardt refinement then iterates on the
nonlinear parameters (σ, ωd, ρ) only, with the amplitudes and the plateau solved by linear least
squares at each step. Counting peaks or zero crossings is avoided: both are biased by noise,
quantisation, the offset and the branch's decay.

A record with many switching edges needs one fit per edge, and a general-purpose solver's fixed
cost per call would dominate; :func:`fit_rings` therefore fits many windows at once, with the matrix
pencil and every refinement step vectorised across batches of up to ``FIT_BATCH`` windows (shorter
windows are padded with zero-weight samples, to the same length in every batch, so that no fit
depends on its batch). :func:`fit_ring` is the single-window form.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

#: Poles kept by the matrix pencil: the ring pair, the branch pole, the plateau and room for noise.
PENCIL_MODEL_ORDER = 6
#: The pencil works on at most this many samples (a start value does not need more). 72 samples
#: give a 25 × 25 Gram matrix: LAPACK's symmetric eigensolver then takes its QR-iteration path,
#: whereas larger sizes use divide and conquer with multithreaded matrix products, which stall
#: for milliseconds when other processes keep the cores busy.
PENCIL_MAX_SAMPLES = 72
#: Smallest ring amplitude, relative to the window's peak-to-peak spread, that counts as a ring.
MIN_RELATIVE_AMPLITUDE = 0.02
#: Fewest cycles of a fitted ring's damped frequency that the window must span for it to count.
MIN_RING_CYCLES = 0.5
#: A fitted pair damped beyond this is not a ring: its one swing is what two real poles give too.
MAX_RING_DAMPING = 0.9
#: Newton steps for the instant the envelope falls below a level (quadratic convergence).
ENVELOPE_NEWTON_STEPS = 30
#: Fewest samples a window may hold for a fit.
MIN_FIT_SAMPLES = 12
#: Refinement stops when a step changes the nonlinear parameters by less than this (relative),
#: or after ``REFINE_MAX_STEPS`` trial steps; from a matrix-pencil start it usually needs a few.
REFINE_STEP_TOLERANCE = 1e-7
REFINE_MAX_STEPS = 20
#: … or when an accepted step lowers the cost by less than this fraction of the mean squared
#: residual per sample, a change of χ² far below one: a parameter the data hardly determine (the
#: decay of a real pole of near-zero amplitude) then stops the search.
REFINE_COST_TOLERANCE = 1e-3
#: Smallest normalised Gram determinant det(G)/Π diag(G) of the basis: below it the basis is
#: degenerate (e.g. less than a fraction of a period in the window, or two equal poles) and a step
#: there is rejected.
MIN_BASIS_INDEPENDENCE = 1e-12
#: Levenberg–Marquardt damping: start, and the factors applied after a good and a rejected step.
LM_INITIAL_DAMPING = 1e-3
LM_DECREASE, LM_INCREASE, LM_MAX_DAMPING = 1 / 3, 4.0, 1e12
#: A ring fitted with a damping ratio above this is also tried as real poles only (no ring).
NO_RING_CHECK_DAMPING = 0.45
#: Residual floor per sample, relative to the window's spread, for the information criterion: a
#: noise-free record is not allowed to pick a model by rounding error.
RESIDUAL_FLOOR = 1e-5
#: Real-pole starts (per window length) tried when the pencil offers none.
REAL_POLE_STARTS = (1.0, 4.0, 16.0)
#: Windows (or starts) that go through the matrix pencil or a refinement together: enough to share
#: the cost of each vectorised step (a record of many edges is fitted as fast as in one batch),
#: few enough that its fits need a few megabytes however many edges it has (about 50 kB a start).
FIT_BATCH = 128


class RingFitError(ValueError):
    """The window holds no decaying oscillation that the model can describe."""


class NoRingError(RingFitError):
    """The window's free response is better described by real poles alone: no ring.

    ``decay_rate_per_s`` is the slowest real pole's decay rate, ``offset_v`` the level the response
    settles to and ``fit_quality`` the R² of that fit.
    """

    def __init__(self, decay_rate_per_s: float, offset_v: float, fit_quality: float) -> None:
        super().__init__(
            f"no ring: the response settles without oscillating (real pole, decay rate "
            f"{decay_rate_per_s:.3g} /s)"
        )
        self.decay_rate_per_s = decay_rate_per_s
        self.offset_v = offset_v
        self.fit_quality = fit_quality


@dataclass(frozen=True)
class RingFit:
    """A fitted ring with, optionally, the real pole of a snubber branch; seconds and volts.

    Attributes
    ----------
    t_start_s : time origin τ = 0 of the model (the first sample of the window).
    amplitude_v : ring envelope at ``t_start_s``.
    phase_rad : phase at ``t_start_s`` (the ring is ``A·exp(-σ·τ)·cos(ωd·τ + φ)``).
    decay_rate_per_s : σ.
    angular_frequency_rad_s : ωd, the damped angular frequency.
    offset_v : c, the level the response settles to.
    fit_quality : coefficient of determination R² over the fitted samples, clipped to 0–1.
    real_pole_amplitude_v : d, the real pole's term at ``t_start_s`` (0 without one).
    real_pole_decay_rate_per_s : ρ, the real pole's decay rate (None without one).
    """

    t_start_s: float
    amplitude_v: float
    phase_rad: float
    decay_rate_per_s: float
    angular_frequency_rad_s: float
    offset_v: float
    fit_quality: float
    real_pole_amplitude_v: float = 0.0
    real_pole_decay_rate_per_s: float | None = None

    @property
    def frequency_hz(self) -> float:
        """Damped ring frequency fd = ωd / 2π."""
        return self.angular_frequency_rad_s / (2 * math.pi)

    @property
    def natural_frequency_hz(self) -> float:
        """Natural frequency fn = |s| / 2π = √(σ² + ωd²) / 2π of the pole s = −σ ± jωd."""
        return math.hypot(self.decay_rate_per_s, self.angular_frequency_rad_s) / (2 * math.pi)

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
        """Instant after which the ring's envelope plus the real pole's term stay below
        ``level_v`` (at least ``t_start_s``; infinite for a level of zero or below, or for a term
        that does not decay).

        The sum of decaying exponentials A·exp(−σ·τ) + |d|·exp(−ρ·τ) is convex and decreasing, so
        Newton's method started where either term alone reaches the level (the later of the two
        instants lies before the root) climbs to the root from below without overshooting.
        """
        terms = [(abs(self.amplitude_v), self.decay_rate_per_s)]
        if self.real_pole_decay_rate_per_s is not None and self.real_pole_amplitude_v:
            terms.append((abs(self.real_pole_amplitude_v), self.real_pole_decay_rate_per_s))
        if level_v <= 0 or min(rate for _, rate in terms) <= 0:
            return math.inf
        tau = max([0.0, *(math.log(a / level_v) / rate for a, rate in terms if a > level_v)])
        for _ in range(ENVELOPE_NEWTON_STEPS):
            excess = sum(a * math.exp(-rate * tau) for a, rate in terms) - level_v
            if excess <= 1e-12 * level_v:
                break
            slope = sum(a * rate * math.exp(-rate * tau) for a, rate in terms)
            tau += excess / slope
        return self.t_start_s + tau

    def evaluate(self, t_s: np.ndarray) -> np.ndarray:
        """Model voltage at the times ``t_s``."""
        tau = np.asarray(t_s, dtype=float) - self.t_start_s
        v = self.offset_v + self.amplitude_v * np.exp(-self.decay_rate_per_s * tau) * np.cos(
            self.angular_frequency_rad_s * tau + self.phase_rad
        )
        if self.real_pole_decay_rate_per_s is not None:
            v = v + self.real_pole_amplitude_v * np.exp(-self.real_pole_decay_rate_per_s * tau)
        return v

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
            -self.real_pole_amplitude_v,
            self.real_pole_decay_rate_per_s,
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


def _pencil_seeds(windows: list[np.ndarray]) -> list[np.ndarray | RingFitError]:
    """Matrix-pencil poles s = log z of each window, per window length, largest amplitude first.

    Each window is decimated to at most ``PENCIL_MAX_SAMPLES``; windows decimated by the same
    stride go through the pencil together, each cut to the shortest of them (the windows of one
    record differ by a few samples, and a start value does not need them). Poles whose amplitude
    is below ``MIN_RELATIVE_AMPLITUDE`` of the window's spread, growing ones and ones beyond
    0.9 × Nyquist are dropped; of a conjugate pair the one with ωd > 0 is kept.
    """
    strides = [max(1, math.ceil(y.size / PENCIL_MAX_SAMPLES)) for y in windows]
    groups: dict[int, list[int]] = {}
    for k, stride in enumerate(strides):
        groups.setdefault(stride, []).append(k)
    seeds: list[np.ndarray | RingFitError] = [RingFitError("")] * len(windows)
    for stride, members in groups.items():
        length = min(-(-windows[k].size // stride) for k in members)
        stack = np.stack([windows[k][::stride][:length] for k in members])
        try:
            parts = [
                matrix_pencil_poles(stack[first : first + FIT_BATCH])
                for first in range(0, len(members), FIT_BATCH)
            ]
        except RingFitError as exc:
            for k in members:
                seeds[k] = exc
            continue
        z, h = (np.concatenate(arrays) for arrays in zip(*parts, strict=True))
        with np.errstate(divide="ignore", invalid="ignore"):  # a pole at 0: decay +inf
            s = np.log(z)
        amplitude = np.abs(h) * np.where(np.abs(s.imag) > 1e-9, 2.0, 1.0)
        keep = (
            (s.imag >= -1e-9)
            & (-s.real > -0.05)
            & (s.imag < 0.9 * math.pi)
            & np.isfinite(s)
            & (amplitude >= MIN_RELATIVE_AMPLITUDE)
        )
        for row, k in enumerate(members):
            order = np.argsort(-amplitude[row])
            poles = s[row, order][keep[row, order]]
            seeds[k] = poles * (windows[k].size / stride)  # per decimated sample → per window
    return seeds


@dataclass(frozen=True)
class _Model:
    """The terms of a free-response model: a ring (complex pair) or not, a number of real poles,
    and always the plateau."""

    ring: bool
    real_poles: int

    @property
    def nonlinear(self) -> int:
        """Number of nonlinear parameters: (σ, ωd) of the ring, then one ρ per real pole."""
        return 2 * self.ring + self.real_poles

    @property
    def linear(self) -> int:
        """Number of linear coefficients: (a, b) of the ring, d per real pole, the plateau c."""
        return self.nonlinear + 1


RING = _Model(ring=True, real_poles=0)
RING_AND_POLE = _Model(ring=True, real_poles=1)
ONE_POLE = _Model(ring=False, real_poles=1)
TWO_POLES = _Model(ring=False, real_poles=2)


def _starts(model: _Model, poles: np.ndarray, ring: tuple[float, float] | None) -> list[np.ndarray]:
    """Start vectors of ``model``'s nonlinear parameters from the pencil's poles (window units).

    ``ring`` is the (σ, ωd) of the ring to start from; without one (the pencil found no
    oscillatory pole, as for a heavily damped ring whose undershoot is within a few codes), the
    ring starts at damping ratios of 0.5 and 0.7 with the natural frequency of the pencil's
    strongest real pole. Real poles come from the pencil's real poles that decay within a few
    window lengths (the plateau's pole sits at 0); where it has too few, from
    ``REAL_POLE_STARTS``.
    """
    real = [float(-p.real) for p in poles if abs(p.imag) < 0.5 and -p.real > 0.3]
    candidates = real + [r for r in REAL_POLE_STARTS if all(abs(r - x) > 0.5 for x in real)]
    if not model.ring:
        heads = [[]]
    elif ring is not None:
        heads = [list(ring)]
    else:
        natural = candidates[0]
        heads = [[zeta * natural, math.sqrt(1 - zeta**2) * natural] for zeta in (0.5, 0.7)]
    if model.real_poles == 0:
        return [np.array(head) for head in heads]
    if model.real_poles == 1:
        rates = candidates[:1]
        return [np.array([*head, rate]) for head in heads for rate in rates]
    pairs = itertools.combinations(sorted(candidates[:3]), 2)
    return [np.array([*head, *pair]) for head in heads for pair in pairs]


def _real_pairs_from_rings(candidates: list[_Candidate]) -> list[np.ndarray]:
    """Starts for two real poles from the ring models' fits: a ring with a real pole that found
    almost no oscillation is two real poles already (its decay and the real pole's); a heavily
    damped pair −σ ± jωd lies between the real poles σ ∓ ωd it splits into."""
    starts = []
    for candidate in candidates:
        sigma, omega = abs(candidate.theta[0]), abs(candidate.theta[1])
        if candidate.model.real_poles:
            starts.append(np.array(sorted((sigma, abs(candidate.theta[2])))))
        if sigma > omega:
            starts.append(np.array([sigma - omega, sigma + omega]))
    return starts


def _ring_start(poles: np.ndarray) -> tuple[float, float] | None:
    """(σ, ωd) of the largest-amplitude decaying oscillatory pole (window units), if any."""
    for p in poles:
        if p.imag > 0.02 * 2 * math.pi:  # more than 1/50 of a cycle across the window
            return max(float(-p.real), 1e-6), float(p.imag)
    return None


@dataclass
class _Projections:
    """Best linear parts at one nonlinear parameter vector per window, and the Gauss–Newton
    system there."""

    ok: np.ndarray  # False where the basis is degenerate
    linear: np.ndarray  # (windows, model.linear): a, b, d…, c
    cost: np.ndarray  # sum of squared weighted residuals
    normal: np.ndarray  # (windows, p, p): JᵀJ
    gradient: np.ndarray  # (windows, p): Jᵀr


class _VarPro:
    """Variable projection of one model on a stack of windows (Golub & Pereyra 1973).

    For fixed nonlinear parameters θ the weighted basis rows B (w·e·cos and w·e·sin of the ring,
    e = exp(−στ); w·g of each real pole, g = exp(−ρτ); w for the plateau) give the linear
    coefficients c = G⁻¹·B·y with G = B·Bᵀ, and the residual r = Bᵀc − y = −P·y, where P projects
    onto the complement of the basis. Kaufman's Jacobian (L. Kaufman, "A variable projection method
    for solving separable nonlinear least squares problems", BIT 15, 1975) is J = P·(∂Bᵀ/∂θ)·c;
    its columns combine the rows D = (τ·w·e·cos, τ·w·e·sin, τ·w·g…): Jσ = −(a·PU + b·PV),
    Jω = b·PU − a·PV, Jρ = −d·PW. So JᵀJ, Jᵀr and the cost follow from the inner products after
    projection, (PM)ᵀ·PM = MᵀM − (BM)ᵀ·G⁻¹·(BM) for M = (y, D): one Gram matrix of the rows
    (B, y, D) per window and step, and no n × p Jacobian.
    """

    def __init__(
        self, ys: list[np.ndarray], ws: list[np.ndarray], model: _Model, length: int
    ) -> None:
        """``length``: samples of every row, at least the longest window (shorter ones are padded
        with zero-weight samples)."""
        self.model = model
        self.tau = np.zeros((len(ys), length))
        self.w = np.zeros((len(ys), length))
        self.y_w = np.zeros((len(ys), length))
        self.size = np.array([y.size for y in ys], dtype=float)
        for k, (y, w) in enumerate(zip(ys, ws, strict=True)):
            self.tau[k, : y.size] = np.arange(y.size) / y.size
            self.w[k, : y.size] = w
            self.y_w[k, : y.size] = y * w

    def _rows(self, index: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """Rows (B, w·y, D) of the windows ``index`` at the parameters ``theta`` (see the class).

        e·cos and e·sin are the real and imaginary parts of exp((−σ + jωd)·τ), which on the
        uniform grid τ = m/n is the running product of one complex factor (likewise g): far
        cheaper than exp, cos and sin of every sample, with a rounding error of order m·ε.
        """
        model, tau, w = self.model, self.tau[index], self.w[index]
        basis = model.linear
        rows = np.empty((index.size, 2 * basis, tau.shape[1]))
        rows[:, basis - 1] = w
        rows[:, basis] = self.y_w[index]
        size = self.size[index][:, None]
        with np.errstate(over="ignore", invalid="ignore"):  # a wild trial step: rejected later
            first = 0
            if model.ring:
                powers = np.empty(tau.shape, dtype=complex)
                powers[:] = np.exp((-theta[:, :1] + 1j * theta[:, 1:2]) / size)
                powers[:, 0] = 1.0
                np.cumprod(powers, axis=1, out=powers)
                np.multiply(powers.real, w, out=rows[:, 0])
                np.multiply(powers.imag, w, out=rows[:, 1])
                first = 2
            for j in range(first, model.nonlinear):
                powers = np.empty(tau.shape)
                powers[:] = np.exp(-theta[:, j : j + 1] / size)
                powers[:, 0] = 1.0
                np.cumprod(powers, axis=1, out=powers)
                np.multiply(powers, w, out=rows[:, j])
            np.multiply(rows[:, : model.nonlinear], tau[:, None], out=rows[:, basis + 1 :])
        return rows

    def project(self, index: np.ndarray, theta: np.ndarray) -> _Projections:
        """Linear coefficients, cost and Gauss–Newton system of the windows ``index``."""
        model, basis = self.model, self.model.linear
        rows = self._rows(index, theta)
        with np.errstate(over="ignore", invalid="ignore"):
            gram = rows @ np.swapaxes(rows, 1, 2)
            basis_gram = gram[:, :basis, :basis]
            scale = np.prod(np.diagonal(basis_gram, axis1=1, axis2=2), axis=1)
            ok = np.isfinite(gram).all(axis=(1, 2))
            ok[ok] = np.linalg.det(basis_gram[ok]) > MIN_BASIS_INDEPENDENCE * scale[ok]
        solved = np.zeros((index.size, basis, basis))
        solved[ok] = np.linalg.solve(basis_gram[ok], gram[ok, :basis, basis:])  # G⁻¹·B·(y, D)
        with np.errstate(over="ignore", invalid="ignore"):  # rows not ``ok``: cost inf below
            projected = (
                gram[:, basis:, basis:] - np.swapaxes(gram[:, :basis, basis:], 1, 2) @ solved
            )
        linear = solved[:, :, 0]
        p = model.nonlinear
        mix = np.zeros((index.size, p, p))  # J = P·Dᵀ·mix
        first = 0
        if model.ring:
            a, b = linear[:, 0], linear[:, 1]
            mix[:, 0, 0], mix[:, 1, 0], mix[:, 0, 1], mix[:, 1, 1] = -a, -b, b, -a
            first = 2
        for j in range(first, p):
            mix[:, j, j] = -linear[:, j]
        mix_t = np.swapaxes(mix, 1, 2)
        with np.errstate(over="ignore", invalid="ignore"):  # rows not ``ok``: never stepped from
            normal = mix_t @ projected[:, 1:, 1:] @ mix
            gradient = -(mix_t @ projected[:, 1:, :1])[:, :, 0]
        return _Projections(
            ok=ok,
            linear=linear,
            cost=np.where(ok, projected[:, 0, 0], np.inf),
            normal=normal,
            gradient=gradient,
        )

    def residual_cost(self, theta: np.ndarray, linear: np.ndarray) -> np.ndarray:
        """Sum of squared weighted residuals, computed from the residuals themselves."""
        rows = self._rows(np.arange(theta.shape[0]), theta)
        basis = self.model.linear
        model = np.einsum("kj,kjn->kn", linear, rows[:, :basis])
        return np.sum((model - rows[:, basis]) ** 2, axis=1)

    def refine(self, theta: np.ndarray) -> _Projections:
        """Least-squares fits from the starts ``theta``: Levenberg–Marquardt per window.

        The step solves (JᵀJ + λ·diag(JᵀJ))·δ = −Jᵀr (Marquardt 1963, with the diagonal scaling
        of Moré 1978); each window's λ shrinks after a step that lowers its cost and grows after
        one that does not. Windows drop out of the batch once a step is below
        ``REFINE_STEP_TOLERANCE`` of the parameters or an accepted one gains less than
        ``REFINE_COST_TOLERANCE`` of the mean squared residual, or once every real pole's term
        starts below the rms residual (lost in the noise, its decay is immaterial; the information
        criterion then keeps or drops it). ``theta`` is updated in place.
        """
        best = self.project(np.arange(theta.shape[0]), theta)
        damping = np.full(theta.shape[0], LM_INITIAL_DAMPING)
        active = best.ok.copy()
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):  # wild trial steps
            return self._levenberg_marquardt(theta, best, damping, active)

    def _levenberg_marquardt(
        self, theta: np.ndarray, best: _Projections, damping: np.ndarray, active: np.ndarray
    ) -> _Projections:
        """The iteration of :meth:`refine`."""
        p = self.model.nonlinear
        eye = np.eye(p)
        for _ in range(REFINE_MAX_STEPS):
            index = np.flatnonzero(active)
            if index.size == 0:
                break
            normal, gradient = best.normal[index], best.gradient[index]
            diagonal = np.diagonal(normal, axis1=1, axis2=2)
            system = normal + damping[index, None, None] * diagonal[:, :, None] * eye
            usable = np.isfinite(system).all(axis=(1, 2)) & (np.abs(np.linalg.det(system)) > 0)
            step = np.zeros((index.size, p))
            step[usable] = -np.linalg.solve(system[usable], gradient[usable][:, :, None])[:, :, 0]
            trial = self.project(index, theta[index] + step)
            accept = usable & (trial.cost <= best.cost[index])  # False for NaN, degenerate
            gain = np.where(accept, best.cost[index] - trial.cost, np.inf)
            taken = index[accept]
            theta[taken] += step[accept]
            for name in ("ok", "linear", "cost", "normal", "gradient"):
                getattr(best, name)[taken] = getattr(trial, name)[accept]
            damping[index] *= np.where(accept, LM_DECREASE, LM_INCREASE)
            # A step below the tolerance ends the search whether or not it lowered the cost: at
            # the minimum, rounding decides the comparison.
            size = np.linalg.norm(theta[index], axis=1)
            converged = (np.linalg.norm(step, axis=1) <= REFINE_STEP_TOLERANCE * size) | (
                gain <= REFINE_COST_TOLERANCE * best.cost[index] / self.size[index]
            )
            if self.model.real_poles:  # a real pole lost in the noise: its decay is immaterial
                first = 2 * self.model.ring
                amplitudes = np.abs(best.linear[index, first : self.model.nonlinear])
                noise = np.sqrt(best.cost[index] / self.size[index])[:, None]
                converged |= np.all(amplitudes < noise, axis=1)
            active[index[converged | ~usable | (damping[index] > LM_MAX_DAMPING)]] = False
        return best


@dataclass(frozen=True)
class RingWindow:
    """One window for :func:`fit_rings`: uniformly spaced samples starting at ``t_start_s``.

    ``weights`` (0–1 per sample, 0 excludes a sample, e.g. a clipped one) and ``start`` (an
    earlier fit of the same ring whose decay and frequency replace the matrix-pencil start of the
    ring) are optional.
    """

    volts: np.ndarray
    sample_interval_s: float
    t_start_s: float = 0.0
    weights: np.ndarray | None = None
    start: RingFit | None = None


@dataclass
class _Candidate:
    """One model's best fit to one window, in window units."""

    model: _Model
    theta: np.ndarray
    linear: np.ndarray
    cost: float


def _fit_model(
    model: _Model,
    starts: dict[int, list[np.ndarray]],
    ys: list[np.ndarray],
    ws: list[np.ndarray],
    refine: bool,
) -> dict[int, _Candidate]:
    """Fit ``model`` from every start of every window, ``FIT_BATCH`` starts at a time, each batch
    padded to the longest window of all (so that no fit depends on the batch it is in); each
    window's best start."""
    batch = [(j, start) for j, window_starts in starts.items() for start in window_starts]
    length = max((ys[j].size for j, _ in batch), default=0)
    best: dict[int, _Candidate] = {}
    for first in range(0, len(batch), FIT_BATCH):
        part = batch[first : first + FIT_BATCH]
        varpro = _VarPro([ys[j] for j, _ in part], [ws[j] for j, _ in part], model, length)
        theta = np.array([start for _, start in part], dtype=float)
        fit = varpro.refine(theta) if refine else varpro.project(np.arange(len(part)), theta)
        cost = np.where(fit.ok, varpro.residual_cost(theta, fit.linear), np.nan)
        for i, (j, _) in enumerate(part):
            if math.isfinite(cost[i]) and (j not in best or cost[i] < best[j].cost):
                best[j] = _Candidate(model, theta[i].copy(), fit.linear[i].copy(), float(cost[i]))
    return best


def _information(candidate: _Candidate, weights: np.ndarray) -> float:
    """Bayesian information criterion n·ln(RSS/n) + k·ln(n) (Schwarz 1978), k counting every
    fitted parameter, with the residual floored at ``RESIDUAL_FLOOR`` per sample."""
    n = float(np.count_nonzero(weights))
    rss = max(candidate.cost, n * RESIDUAL_FLOOR**2)
    k = candidate.model.linear + candidate.model.nonlinear
    return n * math.log(rss / n) + k * math.log(n)


def _ring_problem(candidate: _Candidate, samples: int) -> str | None:
    """Why a ring model's fit is not a ring (None when it is one)."""
    sigma, omega = candidate.theta[:2]
    if not (sigma > 0 and 0 < abs(omega) < math.pi * samples):
        return "the fitted ring is not a decaying oscillation"
    if abs(omega) < 2 * math.pi * MIN_RING_CYCLES:
        return "the fitted ring completes too little of a cycle in the window to be a ring"
    if sigma > MAX_RING_DAMPING * math.hypot(sigma, omega):
        return f"the fitted ring is damped beyond ζ = {MAX_RING_DAMPING:g}: no ring to speak of"
    if math.hypot(*candidate.linear[:2]) < MIN_RELATIVE_AMPLITUDE:
        return "no oscillation stands out of the window's noise and trend"
    if candidate.model.real_poles and not candidate.theta[2] > 0:
        return "the fitted real pole does not decay"
    return None


def fit_rings(windows: list[RingWindow], *, refine: bool = True) -> list[RingFit | RingFitError]:
    """Fit the free response (ring, real pole, plateau) of each window, vectorised across windows.

    Parameters
    ----------
    windows : the windows to fit (see :class:`RingWindow`).
    refine : False returns the starts (with their least-squares amplitudes and plateau)
        unrefined, the model chosen among the ring models only.

    Returns
    -------
    One entry per window: its RingFit, or the RingFitError that says why it has none (too short,
    no decaying oscillation; :class:`NoRingError` when real poles alone describe it better).

    Notes
    -----
    The starts come from the matrix pencil (Hua & Sarkar 1990) on at most ``PENCIL_MAX_SAMPLES``
    samples. The refinement is variable projection (Golub & Pereyra 1973, Kaufman 1975): the
    amplitudes and the plateau are solved by linear least squares for each set of nonlinear
    parameters, which alone are iterated, by Levenberg–Marquardt (Marquardt 1963, Moré 1978). The
    model — ring, or ring and real pole; for a heavily damped ring also one or two real poles
    without a ring — is chosen by the Bayesian information criterion (Schwarz 1978). Time is
    scaled to the window length and voltage to the window's spread so that the problem is well
    conditioned whatever the units.
    """
    results: list[RingFit | RingFitError] = [RingFitError("")] * len(windows)
    members: list[int] = []
    ys: list[np.ndarray] = []
    ws: list[np.ndarray] = []
    levels: list[tuple[float, float]] = []  # (centre, scale) of each window's volts
    longest = max((np.size(window.volts) for window in windows), default=0)
    ones = np.ones(longest)  # the weights of every unweighted window: views, not copies
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
            ones[: y_raw.size] if window.weights is None else np.asarray(window.weights, float)
        )
        levels.append((centre, scale))
    if not members:
        return results

    # An earlier fit of the same ring (RingWindow.start) gives the ring's start, and its real
    # pole's if it has one; the matrix pencil gives the rest.
    ring_starts: dict[int, tuple[float, float] | None] = {}
    pole_starts: dict[int, float] = {}
    for j, k in enumerate(members):
        start = windows[k].start
        if start is not None:
            per_unit = ys[j].size * windows[k].sample_interval_s
            ring_starts[j] = (
                start.decay_rate_per_s * per_unit,
                start.angular_frequency_rad_s * per_unit,
            )
            if start.real_pole_decay_rate_per_s is not None:
                pole_starts[j] = start.real_pole_decay_rate_per_s * per_unit
    need_pencil = [j for j in range(len(members)) if j not in pole_starts]
    pencil: dict[int, np.ndarray | RingFitError] = dict(
        zip(need_pencil, _pencil_seeds([ys[j] for j in need_pencil]), strict=True)
    )
    poles = {j: seed for j, seed in pencil.items() if isinstance(seed, np.ndarray)}
    for j in range(len(members)):
        if j not in ring_starts:
            ring_starts[j] = _ring_start(poles[j]) if j in poles else None

    def starts_of(model: _Model, chosen: list[int]) -> dict[int, list[np.ndarray]]:
        starts = {}
        for j in chosen:
            if model is RING_AND_POLE and j in pole_starts and ring_starts[j] is not None:
                starts[j] = [np.array([*ring_starts[j], pole_starts[j]])]
            else:
                starts[j] = _starts(model, poles.get(j, np.array([])), ring_starts[j])
            if model is TWO_POLES:
                starts[j] += _real_pairs_from_rings(candidates[j])
        return starts

    everyone = list(range(len(members)))
    candidates: dict[int, list[_Candidate]] = {j: [] for j in everyone}
    for model in (RING, RING_AND_POLE):
        for j, candidate in _fit_model(model, starts_of(model, everyone), ys, ws, refine).items():
            candidates[j].append(candidate)

    rings: dict[int, _Candidate] = {}
    problems: dict[int, str] = {}
    for j in everyone:
        valid = []
        for candidate in candidates[j]:
            problem = _ring_problem(candidate, ys[j].size)
            if problem is None:
                valid.append(candidate)
            else:
                problems.setdefault(j, problem)
        if valid:
            rings[j] = min(valid, key=lambda c: _information(c, ws[j]))
    heavy = [
        j
        for j in everyone
        if refine
        and (
            j not in rings
            or rings[j].theta[0] / math.hypot(*rings[j].theta[:2]) > NO_RING_CHECK_DAMPING
        )
    ]
    no_rings: dict[int, _Candidate] = {}
    for model in (ONE_POLE, TWO_POLES):
        for j, candidate in _fit_model(model, starts_of(model, heavy), ys, ws, refine).items():
            if np.all(candidate.theta > 0) and (
                j not in no_rings
                or _information(candidate, ws[j]) < _information(no_rings[j], ws[j])
            ):
                no_rings[j] = candidate

    for j, k in enumerate(members):
        ring, plain = rings.get(j), no_rings.get(j)
        if plain is not None and (
            ring is None or _information(plain, ws[j]) < _information(ring, ws[j])
        ):
            results[k] = _no_ring(windows[k], ys[j], ws[j], levels[j], plain)
        elif ring is not None:
            results[k] = _ring_fit(windows[k], ys[j], ws[j], levels[j], ring)
        else:
            results[k] = RingFitError(
                problems.get(j)
                or (str(pencil[j]) if isinstance(pencil.get(j), RingFitError) else "")
                or "no decaying oscillation among the matrix pencil poles"
            )
    return results


def _quality(y: np.ndarray, w: np.ndarray, cost: float) -> float:
    """R² of a fit with weighted residual sum ``cost``, clipped to 0–1."""
    w2 = w * w
    y_mean = float(w2 @ y) / float(np.sum(w2))
    ss_tot = float(w2 @ (y - y_mean) ** 2) or 1.0
    return min(1.0, max(0.0, 1.0 - cost / ss_tot))


def _ring_fit(
    window: RingWindow,
    y: np.ndarray,
    w: np.ndarray,
    level: tuple[float, float],
    candidate: _Candidate,
) -> RingFit:
    """The RingFit in SI units from a ring model's parameters in window units."""
    decay, omega = (float(x) for x in candidate.theta[:2])
    a, b = (float(x) for x in candidate.linear[:2])
    if omega < 0:
        omega, b = -omega, -b
    seconds_per_unit = y.size * window.sample_interval_s
    centre, scale = level
    has_pole = candidate.model.real_poles == 1
    return RingFit(
        t_start_s=window.t_start_s,
        amplitude_v=math.hypot(a, b) * scale,
        phase_rad=math.atan2(-b, a),
        decay_rate_per_s=decay / seconds_per_unit,
        angular_frequency_rad_s=omega / seconds_per_unit,
        offset_v=float(candidate.linear[-1]) * scale + centre,
        fit_quality=_quality(y, w, candidate.cost),
        real_pole_amplitude_v=float(candidate.linear[2]) * scale if has_pole else 0.0,
        real_pole_decay_rate_per_s=float(candidate.theta[2]) / seconds_per_unit
        if has_pole
        else None,
    )


def _no_ring(
    window: RingWindow,
    y: np.ndarray,
    w: np.ndarray,
    level: tuple[float, float],
    candidate: _Candidate,
) -> NoRingError:
    """The NoRingError in SI units from a real-poles model's parameters in window units."""
    seconds_per_unit = y.size * window.sample_interval_s
    centre, scale = level
    return NoRingError(
        decay_rate_per_s=float(np.min(candidate.theta)) / seconds_per_unit,
        offset_v=float(candidate.linear[-1]) * scale + centre,
        fit_quality=_quality(y, w, candidate.cost),
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
    """Fit the free response (ring, real pole, plateau) of one window starting at ``t_start_s``.

    Parameters
    ----------
    volts : samples of the window, uniformly spaced by ``sample_interval_s``.
    sample_interval_s : spacing of ``volts`` (after any decimation by the caller).
    t_start_s : time of ``volts[0]``.
    weights : optional 0–1 weight per sample (0 excludes a sample, e.g. a clipped one).
    refine : False returns the matrix-pencil start (with its least-squares amplitudes) unrefined.
    start : an earlier fit of the same ring (e.g. on a shorter window) whose decay rate and
        frequency replace the matrix-pencil start of the ring.

    Returns
    -------
    RingFit

    Raises
    ------
    RingFitError
        When the window is too short or holds no decaying oscillation (:class:`NoRingError` when
        it settles without oscillating).

    Notes
    -----
    The single-window form of :func:`fit_rings`, which describes the method.
    """
    window = RingWindow(volts, sample_interval_s, t_start_s, weights, start)
    result = fit_rings([window], refine=refine)[0]
    if isinstance(result, RingFitError):
        raise result
    return result
