"""Figures of every turn-off edge in a switch-node capture: levels, overshoot, ring, settling, loss.

How the plateau is found
------------------------
IEEE Std 181's histogram mode method takes the high state level as the mode of the upper half of
the histogram. On a record that is mostly ringing that mode can sit on a ring extreme, because a
sinusoid spends most of its time near its turning points. The whole-record histogram is therefore
used only to find the edges; each edge's plateau is then the histogram mode of the stretch after
its fitted ring has decayed (below 5 % of the step) and before the node leaves the plateau again
(a DCM valley ring or the next turn-on). When that stretch is shorter than two ring periods (the
record is mostly ringing) the plateau is the level the fitted ring decays to (the fit's offset).
The base level is the mode of the lower half of the whole-record histogram (IEEE 181, 5.2.1.3).

The ring
--------
The fit covers the first, dominant ring after each edge (:mod:`labseq.analysis.ringfit`: the ring,
the RC damper's real pole and the plateau, the model order chosen from the data). A rough fit
sizes the window: about three decay time constants of the ring and of the real pole (at least 3
and at most 20 ring periods), ending early where the node departs from the plateau by more than
10 % of the step after the ring has decayed, so a later, slower ring is not mixed in. A ring that
the rough fit finds damped beyond ζ = 0.3 is fitted from the last crossing of the plateau before
the peak, where the free response starts and where a heavily damped ring shows most of itself; a
lighter one from its peak (or after the last clipped sample). The window is decimated to at most
``FIT_MAX_SAMPLES`` samples, which keeps at least 20 samples per ring period. A fit that
explains less than ``MIN_RING_FIT_QUALITY`` of the window's variance has found noise, not a ring
(e.g. a rectifier whose damper leaves a single undershoot and no oscillation): the edge then has
no ring figures, and its plateau is the record's high state level. An edge whose response is
better described without a ring reports "no ring" and the real pole's decay rate.

The RCD clamp (:func:`clamp_figures`)
-------------------------------------
While the clamp diode conducts, the switch node is tied to the clamp capacitor: the spike after
turn-off is held flat for the tens of ns the leakage current takes to charge the capacitor, then
the node rings down to the reflected plateau. The clamp level is the histogram mode of the first
contiguous run of samples above half-way from the reflected plateau to the peak (the flat top,
plus the rounded start of the ring's first fall, which the mode ignores); the capacitor's voltage
climbs a little as it charges, and a sinusoid's or a charging curve's samples crowd near its top,
so the mode is the capacitor's voltage near the end of conduction — the top of its ripple. Limits:
a top shorter than a few samples, or held for less time than the ring spends near one of its
later crests, gives the ring's level rather than the clamp's; a clipped top is not measured.

The clamp resistor returns the capacitor's charge to the bus, so it carries the capacitor's
voltage above the bus, Vc = clamp level − bus, and dissipates Vc²/Rclamp (the relation of the
usual RCD clamp design, Fairchild AN-4147, from memory). Between two conductions Vc decays as
exp(−t/RC) over the switching period T; its mean square over the period is
Vc_top²·RC/(2T)·(1 − exp(−2T/RC)), which sets the loss (a ripple of a few % of Vc, 5–10 % of the
loss, otherwise ignored). The bus is the DC line; on an AC line it is the centre of the DCM valley
ring after demagnetisation (Lm rings around the bus, volt-second balance), fitted as a decaying
sinusoid, or √2·Vrms (the rectified line's peak, with no bridge drop and no ripple) when the
record has no valley ring (CCM): that estimate is high by the bulk capacitor's ripple.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, fields

import numpy as np

from labseq.analysis.levels import (
    BLOCK_SAMPLES,
    HIGH_REFERENCE,
    LOW_REFERENCE,
    MID_REFERENCE,
    histogram_mode,
    histogram_state_levels,
    last_band_entry,
    last_upward_crossing,
    reference_level,
    state_changes,
    subsample_stride,
)
from labseq.analysis.ringfit import NoRingError, RingFit, RingWindow, fit_rings
from labseq.analysis.snubber import (
    BRANCH_SETTLE_TIME_CONSTANTS,
    CV2F,
    WAVEFORM,
    SnubberBranch,
    branch_period_means_w,
    cv2f_loss_w,
    noise_power_w,
    waveform_method_record_s,
)
from labseq.figures import DEFAULT_DERATING, DEFAULT_SETTLING_BAND

#: Shortest record the analysis accepts.
MIN_RECORD_SAMPLES = 32
#: Fit windows are decimated to at most this many samples (20 periods at 20 samples each).
FIT_MAX_SAMPLES = 400
#: Fit window span: about this many decay time constants, bounded in ring periods.
FIT_TIME_CONSTANTS = 3.0
FIT_MIN_PERIODS = 3.0
FIT_MAX_PERIODS = 20.0
#: Departure from the plateau (fraction of the step) that ends the fit window and plateau stretch.
DEPARTURE_FRACTION = 0.1
#: Samples of the quiet plateau stretch that its histogram uses (a regular subsample: the
#: stretch holds only the level, noise and the decayed ring, so a few thousand samples suffice).
PLATEAU_HISTOGRAM_SAMPLES = 4096
#: The ring counts as decayed once its envelope is below this fraction of the step.
DECAYED_FRACTION = 0.05
#: A transition slower than this many times the fastest one in the record is a resonant swing
#: (e.g. a DCM valley ring reaching the low state), not a switching edge.
SLOW_SWING_FACTOR = 10.0
#: Consecutive samples in the settling band that show an edge without a fitted ring has settled.
QUIET_SAMPLES = 32
#: A ring damped more than this (by the rough fit) is fitted from the plateau crossing, where its
#: free response starts; a lighter one from its peak (see :func:`_free_response_start`).
EARLY_START_DAMPING = 0.3
#: Least R² of a final ring fit for its figures to count (see the module notes).
MIN_RING_FIT_QUALITY = 0.5
#: ``ring_model`` of an edge: a ring alone, a ring with the snubber branch's real pole, no ring.
RING_ONLY, RING_AND_POLE, NO_RING = "ring", "ring and real pole", "no ring"
#: Figures that only a ring has.
RING_FIGURES = (
    "ring_frequency_hz",
    "natural_frequency_hz",
    "decay_rate_per_s",
    "damping_ratio",
    "q_factor",
    "fit_quality",
)
#: Second differences used for the noise level (evenly spaced over the record), and the clip, in
#: robust standard deviations, that leaves the edges out of it.
NOISE_MAX_SAMPLES = 1 << 14
NOISE_CLIP_SIGMAS = 4.0


class NoEdgeError(ValueError):
    """The record holds no turn-off edge to analyse."""


@dataclass(frozen=True)
class EdgeFigures:
    """Figures of one turn-off edge, SI units; None where the record does not determine them.

    With ``clipped`` True the record hit full scale near this edge: ``peak_v``, ``overshoot_v``
    and ``overshoot_pct`` are then lower bounds and ``stress_margin_v`` an upper bound.
    """

    base_v: float
    plateau_v: float
    peak_v: float
    overshoot_v: float
    overshoot_pct: float
    rise_time_s: float | None
    edge_time_s: float
    ring_frequency_hz: float | None
    natural_frequency_hz: float | None
    decay_rate_per_s: float | None
    damping_ratio: float | None
    q_factor: float | None
    real_pole_decay_rate_per_s: float | None
    ring_model: str | None
    fit_quality: float | None
    settling_time_s: float | None
    snubber_loss_w: float | None
    snubber_loss_method: str | None
    stress_margin_v: float | None
    clipped: bool

    def as_dict(self) -> dict[str, float | str | bool | None]:
        """Plain dict for JSON and the store (keys are the field names)."""
        return asdict(self)


#: Names of the per-edge figures, in order (JSON keys and store columns).
EDGE_FIGURE_NAMES: tuple[str, ...] = tuple(f.name for f in fields(EdgeFigures))


@dataclass(frozen=True)
class CaptureFigures:
    """Figures of every turn-off edge in a capture; ``worst`` is the edge with the highest peak.

    ``clipped`` is True when any sample of the capture hit full scale. ``ring_fits`` holds each
    edge's fitted ring (None where the fit failed), in the record's own polarity.
    """

    edges: list[EdgeFigures]
    worst: EdgeFigures
    worst_index: int
    clipped: bool
    polarity: int
    ring_fits: list[RingFit | None] = field(default_factory=list, repr=False, compare=False)

    def as_dict(self) -> dict[str, object]:
        """The worst edge's figures at the top level, plus ``edges`` (one dict per edge)."""
        return {
            **self.worst.as_dict(),
            "clipped": self.clipped,
            "worst_edge_index": self.worst_index,
            "polarity": self.polarity,
            "edges": [edge.as_dict() for edge in self.edges],
        }


class _Negated:
    """A falling record seen turned over (−v) without a negated copy of the whole record: each
    sample, slice or subsample is negated as it is taken. Records run to tens of millions of
    samples, and the analysis reads most of them only a block at a time."""

    def __init__(self, volts: np.ndarray) -> None:
        self.volts = volts
        self.size = volts.size

    def __len__(self) -> int:
        return self.size

    def __getitem__(self, key: int | slice | np.ndarray) -> np.ndarray | np.floating:
        return np.negative(self.volts[key])

    def __array__(self, dtype: np.dtype | None = None, copy: bool | None = None) -> np.ndarray:
        return np.negative(self.volts, dtype=dtype)


#: The samples as the edge analysis sees them: the record itself, or a falling record turned over.
Samples = np.ndarray | _Negated


@dataclass(frozen=True)
class _Record:
    """The record as the edge analysis sees it: turned so that turn-off rises."""

    u: Samples
    dt: float
    t0: float
    clip: np.ndarray | None  # samples at full scale; None when none is
    flagged: bool
    base: float
    top: float
    any_clipped: bool  # some sample is in ``clip``
    noise_v: float  # rms noise of the record (record_noise_rms_v)


def _check_inputs(
    volts: np.ndarray,
    sample_interval_s: float,
    polarity: int,
    settling_band: float,
    rating_v: float | None,
    derating: float,
) -> np.ndarray:
    v = np.asarray(volts, dtype=float)
    if v.ndim != 1:
        raise ValueError(f"volts must be a 1-D array, got shape {v.shape}")
    if v.size < MIN_RECORD_SAMPLES:
        raise ValueError(f"the record has {v.size} samples; at least {MIN_RECORD_SAMPLES} needed")
    # A finite sum is the cheap proof that every sample is finite; only if it is not (a NaN or
    # infinity, or an overflow of huge values) are the samples themselves checked.
    if not math.isfinite(float(np.sum(v))) and not np.all(np.isfinite(v)):
        bad = int(np.flatnonzero(~np.isfinite(v))[0])
        raise ValueError(f"volts holds a non-finite value at sample {bad}")
    if not (math.isfinite(sample_interval_s) and sample_interval_s > 0):
        raise ValueError(f"sample_interval_s must be positive, got {sample_interval_s!r}")
    if polarity not in (1, -1):
        raise ValueError(f"polarity must be +1 (rising turn-off) or -1 (falling), got {polarity!r}")
    if not 0 < settling_band < 1:
        raise ValueError(
            f"settling_band is a fraction of the step between 0 and 1, got {settling_band!r}"
        )
    if rating_v is not None and not rating_v > 0:
        raise ValueError(f"rating_v must be positive, got {rating_v!r}")
    if not 0 < derating <= 1:
        raise ValueError(f"derating must be in (0, 1], got {derating!r}")
    return v


def _clip_mask(
    v: np.ndarray, full_scale_v: tuple[float, float] | None, clipped: np.ndarray | bool | None
) -> tuple[np.ndarray | None, bool]:
    """Samples known to be at or beyond full scale (None when no sample is), and the caller's
    whole-record flag.

    A per-sample mask also keeps those samples out of the ring fit; a single flag cannot say
    which samples are affected, so it only marks the figures as bounds. Full scale is looked for
    a block at a time, and a mask is made only once a sample there is found.
    """
    at_scale: Callable[[np.ndarray], np.ndarray] | None = None
    if full_scale_v is not None:
        low, high = (float(x) for x in full_scale_v)
        if not high > low:
            raise ValueError(
                f"full_scale_v must be (low, high) with low < high, got {full_scale_v}"
            )
        tolerance = 1e-6 * (high - low)

        def at_scale(x: np.ndarray) -> np.ndarray:
            return (x >= high - tolerance) | (x <= low + tolerance)

    flags = np.asarray(False if clipped is None else clipped, dtype=bool)
    flagged = flags.ndim == 0 and bool(flags)
    if flags.ndim and flags.shape != v.shape:
        raise ValueError(f"clipped mask has shape {flags.shape}, the record {v.shape}")
    mask = flags if flags.ndim else None
    if at_scale is not None:
        for start in range(0, v.size, BLOCK_SAMPLES):
            hit = at_scale(v[start : start + BLOCK_SAMPLES])
            if hit.any():
                if mask is None or mask is flags:  # the caller's mask is not written to
                    mask = np.zeros(v.size, dtype=bool) if mask is None else flags.copy()
                mask[start : start + BLOCK_SAMPLES] |= hit
    return (mask if mask is not None and mask.any() else None), flagged


def _first_where(
    u: Samples, start: int, stop: int, test: Callable[[np.ndarray], np.ndarray]
) -> int:
    """First index in [start, stop) whose sample passes ``test``; ``stop`` if none.

    Searched in chunks that double in length up to ``BLOCK_SAMPLES``, so an early find costs
    little and a late one no record-long temporary.
    """
    chunk = 4096
    while start < stop:
        end = min(stop, start + chunk)
        found = np.flatnonzero(test(u[start:end]))
        if found.size:
            return start + int(found[0])
        start, chunk = end, min(2 * chunk, BLOCK_SAMPLES)
    return stop


def _first_departure(u: Samples, start: int, stop: int, centre: float, half_width: float) -> int:
    """First index in [start, stop) where |u − centre| exceeds ``half_width``; ``stop`` if none."""
    return _first_where(u, start, stop, lambda x: np.abs(x - centre) > half_width)


def _first_quiet_run(
    u: Samples, start: int, stop: int, centre: float, half_width: float, length: int
) -> int | None:
    """First index in [start, stop) that starts ``length`` samples in a row within
    ``centre ± half_width``; None if there is none. Searched a block at a time."""
    last_out = start - 1  # the last sample outside the band so far
    for begin in range(start, stop, BLOCK_SAMPLES):
        end = min(stop, begin + BLOCK_SAMPLES)
        outside = np.flatnonzero(np.abs(u[begin:end] - centre) > half_width) + begin
        bounds = np.concatenate(([last_out], outside, [end]))
        quiet = np.flatnonzero(np.diff(bounds) > length)  # ≥ length inside between two bounds
        if quiet.size:
            return int(bounds[quiet[0]]) + 1
        if outside.size:
            last_out = int(outside[-1])
    return None


def _argmax(u: Samples, start: int, stop: int) -> int:
    """Index of the first largest sample in [start, stop), searched a block at a time."""
    best, best_v = start, -math.inf
    for begin in range(start, stop, BLOCK_SAMPLES):
        block = u[begin : min(stop, begin + BLOCK_SAMPLES)]
        i = int(np.argmax(block))
        if block[i] > best_v:
            best, best_v = begin + i, float(block[i])
    return best


@dataclass(frozen=True)
class _Span:
    """One turn-off edge's stretch of the record: from the end of the previous low state
    (``search_from``) through the first sample in the high state (``first_high``) and the peak
    to the last sample before the node leaves the high state (``high_end``)."""

    search_from: int
    first_high: int
    peak: int
    high_end: int


def _window(rec: _Record, start: int, samples: int, rough: RingFit | None = None) -> RingWindow:
    """The fit window of ``samples`` samples from ``start``, decimated to ``FIT_MAX_SAMPLES``."""
    stride = max(1, -(-samples // FIT_MAX_SAMPLES))
    window = slice(start, start + samples, stride)
    return RingWindow(
        rec.u[window],
        rec.dt * stride,
        rec.t0 + start * rec.dt,
        weights=None if not rec.any_clipped else (~rec.clip[window]).astype(float),
        start=rough,
    )


def _rough_window(rec: _Record, span: _Span) -> tuple[int, int] | None:
    """(start, samples) of the rough pass, or None when too little of the ring is in the record.

    The rough window runs to sixteen times the delay from the 90 % crossing to the peak (which is
    at least a quarter ring period) past the peak, and starts where the free response does, taking
    the record's high state level as the plateau (:func:`_free_response_start`), or after the
    last clipped sample near the peak.
    """
    rough_samples = min(
        max(16 * max(span.peak - span.first_high, 2), 48), span.high_end - span.peak
    )
    start = span.peak
    if rec.any_clipped:
        clipped_after = np.flatnonzero(rec.clip[start : start + rough_samples])
        if clipped_after.size:
            start += int(clipped_after[-1]) + 1
    start = _free_response_start(rec, rec.top, span, start)
    rough_samples = min(span.peak + rough_samples, span.high_end) - start
    return (start, rough_samples) if rough_samples >= 24 else None


def _free_response_start(rec: _Record, plateau_v: float, span: _Span, start: int) -> int:
    """First sample of the free response: the last upward crossing of the plateau before the peak.

    Until the node reaches the plateau the secondary (or the clamp) does not conduct and the node
    is charged by the magnetising current; from then on the leakage inductance rings freely with
    the node. The samples between that crossing and the peak carry most of what a heavily damped
    ring shows (one overshoot, hardly an undershoot), so the fit starts there. Without a crossing,
    or with clipped samples after it (the matrix pencil cannot leave them out), the window keeps
    ``start``.
    """
    crossing = last_upward_crossing(rec.u, plateau_v, span.first_high, span.peak + 1)
    if crossing is None or math.ceil(crossing) >= start:
        return start
    first = math.ceil(crossing)
    return start if rec.any_clipped and bool(np.any(rec.clip[first:start])) else first


def _final_samples(rec: _Record, rough: RingFit, start: int, high_end: int) -> int:
    """Length of the final window: about ``FIT_TIME_CONSTANTS`` decay time constants of the ring
    and of the branch's real pole (bounded in ring periods), ending early where the node departs
    from the plateau after the ring."""
    period_samples = 2 * math.pi / rough.angular_frequency_rad_s / rec.dt
    slowest = rough.decay_rate_per_s
    if rough.real_pole_decay_rate_per_s is not None and rough.real_pole_decay_rate_per_s > 0:
        slowest = min(slowest, rough.real_pole_decay_rate_per_s)
    span_samples = min(
        max(FIT_TIME_CONSTANTS / slowest / rec.dt, FIT_MIN_PERIODS * period_samples),
        FIT_MAX_PERIODS * period_samples,
    )
    step = abs(rough.offset_v - rec.base)
    decayed = rough.time_envelope_below_s(0.5 * DEPARTURE_FRACTION * step)
    quiet = max(start, math.ceil((decayed - rec.t0) / rec.dt))
    stop = _first_departure(rec.u, quiet, high_end, rough.offset_v, DEPARTURE_FRACTION * step)
    return int(min(span_samples, stop - start))


def _fit_dominant_rings(rec: _Record, spans: list[_Span]) -> list[RingFit | NoRingError | None]:
    """Two-pass fit of the first ring after each edge (see the module notes).

    The rough pass sizes each final window, which starts where the free response does; both
    passes fit every edge of the record in one vectorised call
    (:func:`labseq.analysis.ringfit.fit_rings`). An edge whose response settles without ringing
    gets its :class:`NoRingError` (with the real pole's decay); one with no usable fit, None.
    """
    rough_windows = {k: w for k, span in enumerate(spans) if (w := _rough_window(rec, span))}
    roughs = fit_rings([_window(rec, *w) for w in rough_windows.values()])
    found: dict[int, RingFit | NoRingError] = {
        k: fit
        for k, fit in zip(rough_windows, roughs, strict=True)
        if isinstance(fit, RingFit | NoRingError)
    }
    final_windows = {}
    for k, rough in found.items():
        after_peak = max(spans[k].peak, rough_windows[k][0])  # the peak, or after clipping
        heavy = not isinstance(rough, RingFit) or rough.damping_ratio > EARLY_START_DAMPING
        start = (
            _free_response_start(rec, rough.offset_v, spans[k], after_peak) if heavy else after_peak
        )
        if isinstance(rough, RingFit):
            samples = _final_samples(rec, rough, after_peak, spans[k].high_end)
        else:  # about FIT_TIME_CONSTANTS of the real pole; the ring's start from the pencil
            samples = min(
                math.ceil(FIT_TIME_CONSTANTS / rough.decay_rate_per_s / rec.dt),
                spans[k].high_end - after_peak,
            )
        final_windows[k] = _window(
            rec, start, samples + after_peak - start, rough if isinstance(rough, RingFit) else None
        )
    finals = fit_rings(list(final_windows.values()))
    for k, fit in zip(final_windows, finals, strict=True):
        best = fit if isinstance(fit, RingFit | NoRingError) else found[k]
        if best.fit_quality >= MIN_RING_FIT_QUALITY:
            found[k] = best
        else:
            del found[k]
    return [found.get(k) for k in range(len(spans))]


def _plateau(rec: _Record, fit: RingFit | None, peak: int, high_end: int) -> float:
    """Level of the high state after this edge (see the module notes for the method)."""
    if fit is None:
        return rec.top
    step = fit.offset_v - rec.base
    decayed = fit.time_envelope_below_s(DECAYED_FRACTION * abs(step))
    quiet = max(peak, math.ceil((decayed - rec.t0) / rec.dt))
    stop = _first_departure(rec.u, quiet, high_end, fit.offset_v, DEPARTURE_FRACTION * abs(step))
    period_samples = 2 * math.pi / fit.angular_frequency_rad_s / rec.dt
    if stop - quiet >= max(32, 2 * period_samples):
        stride = subsample_stride(stop - quiet, PLATEAU_HISTOGRAM_SAMPLES)
        return histogram_mode(rec.u[quiet:stop:stride])
    return fit.offset_v


def _ring_figures(fit: RingFit | NoRingError | None) -> dict[str, float | str | None]:
    """The ring's figures of an edge: from a fitted ring, from a response with no ring (only the
    real pole's decay), or none."""
    if isinstance(fit, NoRingError):
        return {
            **dict.fromkeys(RING_FIGURES),
            "real_pole_decay_rate_per_s": fit.decay_rate_per_s,
            "ring_model": NO_RING,
            "fit_quality": fit.fit_quality,
        }
    if fit is None:
        return dict.fromkeys((*RING_FIGURES, "real_pole_decay_rate_per_s", "ring_model"))
    return {
        "ring_frequency_hz": fit.frequency_hz,
        "natural_frequency_hz": fit.natural_frequency_hz,
        "decay_rate_per_s": fit.decay_rate_per_s,
        "damping_ratio": fit.damping_ratio,
        "q_factor": fit.q_factor,
        "fit_quality": fit.fit_quality,
        "real_pole_decay_rate_per_s": fit.real_pole_decay_rate_per_s,
        "ring_model": RING_AND_POLE if fit.real_pole_decay_rate_per_s is not None else RING_ONLY,
    }


def _edge(
    rec: _Record, span: _Span, result: RingFit | NoRingError | None, settling_band: float
) -> dict[str, float | str | bool | None] | None:
    """Figures of the edge in ``span`` with its fitted ring (None: not measurable)."""
    fit = result if isinstance(result, RingFit) else None
    u, dt, t0 = rec.u, rec.dt, rec.t0
    search_from, peak, high_end = span.search_from, span.peak, span.high_end
    plateau = _plateau(rec, fit, peak, high_end)
    step = plateau - rec.base
    if step <= 0:
        return None
    t10, t50, t90 = (
        last_upward_crossing(u, reference_level(rec.base, plateau, fraction), search_from, peak + 1)
        for fraction in (LOW_REFERENCE, MID_REFERENCE, HIGH_REFERENCE)
    )
    if t50 is None:
        return None
    half_band = settling_band * step
    # Without a fit, the node is quiet from the first run of QUIET_SAMPLES samples in the band;
    # the search for the last entry ends where it next leaves the band.
    limit = high_end + 1
    if fit is None:
        quiet_from = _first_quiet_run(u, peak, limit, plateau, half_band, QUIET_SAMPLES)
        if quiet_from is not None:
            limit = _first_departure(u, quiet_from, limit, plateau, half_band)
    else:
        decayed = fit.time_envelope_below_s(0.5 * half_band)
        quiet = max(peak, math.ceil((decayed - t0) / dt))
        limit = _first_departure(u, quiet, high_end + 1, plateau, half_band)
    entry = last_band_entry(u, plateau, half_band, math.ceil(t50), limit)
    overshoot = float(u[peak]) - plateau
    figures: dict[str, float | bool | None] = {
        "plateau_v": plateau,
        "peak_v": float(u[peak]),
        "overshoot_v": overshoot,
        "overshoot_pct": 100.0 * overshoot / step,
        "rise_time_s": (t90 - t10) * dt if t10 is not None and t90 is not None else None,
        "edge_time_s": t0 + t50 * dt,
        **_ring_figures(result),
        "settling_time_s": (entry - t50) * dt if entry is not None else None,
        "clipped": rec.flagged
        or (rec.any_clipped and bool(np.any(rec.clip[search_from : high_end + 1]))),
    }
    return figures


def _snubber_losses(
    rec: _Record, edges: list[dict[str, float | bool | None]], branch: SnubberBranch
) -> list[tuple[float, str]]:
    """Per-edge snubber resistor loss and the method used (see ``analyze_capture``)."""
    record_s = (rec.u.size - 1) * rec.dt
    settle_s = BRANCH_SETTLE_TIME_CONSTANTS * branch.time_constant_s
    if record_s < waveform_method_record_s(branch):
        return [
            (cv2f_loss_w(branch.cs_f, float(e["plateau_v"]) - rec.base, branch.fsw_hz), CV2F)
            for e in edges
        ]
    centred = np.array([float(e["edge_time_s"]) - rec.t0 for e in edges]) - 0.5 * branch.period_s
    starts = np.clip(centred, settle_s, record_s - branch.period_s)
    bias_w = noise_power_w(rec.noise_v, rec.dt, branch)
    means = branch_period_means_w(rec.u, rec.dt, branch, starts)
    return [(max(float(p) - bias_w, 0.0), WAVEFORM) for p in means]


def record_noise_rms_v(u: np.ndarray) -> float:
    """Rms of the record's white noise, from its second differences d = u[n+1] − 2·u[n] + u[n−1].

    For white noise of variance σ², d has variance 6σ², while the waveform itself — plateaus,
    on-state ramps, rings of many samples per period — adds little to d except at the few samples
    of each edge. σ is first estimated robustly from the median absolute d (1.4826·MAD/√6 for a
    Gaussian), then as the rms of the d within ``NOISE_CLIP_SIGMAS`` of it, which leaves the edges
    out. At most ``NOISE_MAX_SAMPLES`` evenly spaced d are used. Noise limited to a band below
    the sample rate (correlated samples) reads low, so less is subtracted and the loss errs high.
    """
    if u.size < MIN_RECORD_SAMPLES:
        return 0.0
    middle = np.arange(1, u.size - 1, max(1, (u.size - 2) // NOISE_MAX_SAMPLES))
    d = u[middle + 1] - 2.0 * u[middle] + u[middle - 1]
    rough = 1.4826 * float(np.median(np.abs(d))) / math.sqrt(6.0)
    if rough == 0.0:  # the noise is below the quantisation step
        return 0.0
    quiet = d[np.abs(d) <= NOISE_CLIP_SIGMAS * math.sqrt(6.0) * rough]
    return float(np.sqrt(np.mean(quiet * quiet) / 6.0))


#: Samples above this share of the way from the reflected plateau to the peak count as the clamp's
#: flat top.
CLAMP_TOP_FRACTION = 0.5
#: The valley ring must last at least this many of its periods to be fitted for the bus voltage.
VALLEY_MIN_PERIODS = 1.0
#: and its fit must explain at least this share of the variance (R²).
VALLEY_MIN_FIT_QUALITY = 0.9
#: Stride (samples) of the walk back from the turn-on edge to the last crest before it.
VALLEY_WALK_SAMPLES = 8


@dataclass(frozen=True)
class ClampFigures:
    """The RCD clamp seen in one primary capture (see the module notes for the method).

    ``bus_method`` says where the bus came from: "dc-line", "valley-ring" or "line-peak".
    """

    clamp_level_v: float  # node voltage while the clamp diode conducts (top of the ripple)
    bus_v: float
    bus_method: str
    clamp_voltage_v: float  # capacitor voltage above the bus, rms over the switching period
    clamp_loss_w: float

    def as_dict(self) -> dict[str, float | str]:
        """The stored figures: level and loss, with the bus method as the loss's method."""
        return {
            "clamp_level_v": self.clamp_level_v,
            "clamp_loss_w": self.clamp_loss_w,
            "clamp_loss_method": self.bus_method,
        }


def clamp_level_v(
    volts: np.ndarray, sample_interval_s: float, t0_s: float, edge: EdgeFigures
) -> float | None:
    """Level the spike after ``edge`` is held at by the clamp (None when the top clipped)."""
    v = np.asarray(volts, dtype=float)
    start = min(max(0, math.floor((edge.edge_time_s - t0_s) / sample_interval_s)), v.size - 1)
    level = edge.plateau_v + CLAMP_TOP_FRACTION * (edge.peak_v - edge.plateau_v)
    first = _first_where(v, start, v.size, lambda x: x > level)
    if edge.clipped or first == v.size:
        return None
    stop = _first_where(v, first, v.size, lambda x: x <= level)
    return histogram_mode(v[first:stop])


def valley_ring_centre_v(
    volts: np.ndarray, sample_interval_s: float, t0_s: float, edge: EdgeFigures
) -> float | None:
    """Centre of the DCM valley ring after ``edge``'s plateau, or None when there is none.

    The ring runs from the node's departure from the plateau (by 10 % of the step) to the last
    crest before the next turn-on pulls the node below 10 % of the step.
    """
    v = np.asarray(volts, dtype=float)
    dt = sample_interval_s
    step = edge.plateau_v - edge.base_v
    quiet_s = edge.edge_time_s + (edge.settling_time_s or 0.0)
    start = min(max(0, math.ceil((quiet_s - t0_s) / dt)), v.size)
    depart = _first_departure(v, start, v.size, edge.plateau_v, DEPARTURE_FRACTION * step)
    low = edge.base_v + LOW_REFERENCE * step
    stop = _first_where(v, depart, v.size, lambda x: x < low)
    tolerance = 0.005 * step
    while (
        stop - VALLEY_WALK_SAMPLES > depart
        and v[stop - VALLEY_WALK_SAMPLES] >= v[stop - 1] - tolerance
    ):
        stop -= VALLEY_WALK_SAMPLES
    if stop - depart < MIN_RECORD_SAMPLES:
        return None
    stride = max(1, -(-(stop - depart) // FIT_MAX_SAMPLES))
    window = RingWindow(v[depart:stop:stride], dt * stride, t0_s + depart * dt)
    fit = fit_rings([window])[0]
    if not isinstance(fit, RingFit) or fit.fit_quality < VALLEY_MIN_FIT_QUALITY:
        return None
    if (stop - depart) * dt * fit.frequency_hz < VALLEY_MIN_PERIODS:
        return None
    return fit.offset_v


def clamp_figures(
    volts: np.ndarray,
    sample_interval_s: float,
    t0_s: float,
    figures: CaptureFigures,
    *,
    resistance_ohm: float,
    capacitance_f: float,
    switching_frequency_hz: float,
    line_v: float,
    line_is_ac: bool,
) -> ClampFigures | None:
    """The RCD clamp's level and loss at the worst edge of a primary capture (module notes).

    Parameters
    ----------
    volts, sample_interval_s, t0_s : the record, as given to :func:`analyze_capture`.
    figures : its analysis (a rising node: the primary switch).
    resistance_ohm, capacitance_f : the clamp's resistor and capacitor.
    switching_frequency_hz : the converter's, for the capacitor's ripple over a period.
    line_v, line_is_ac : the line setpoint (DC volts or AC rms volts), for the bus.

    Returns None when the clamp level cannot be measured (the top clipped, no spike above the
    plateau).
    """
    edge = figures.worst
    level_v = clamp_level_v(volts, sample_interval_s, t0_s, edge)
    if level_v is None:
        return None
    if not line_is_ac:
        bus_v, method = line_v, "dc-line"
    else:
        centre_v = valley_ring_centre_v(volts, sample_interval_s, t0_s, edge)
        if centre_v is not None:
            bus_v, method = centre_v, "valley-ring"
        else:
            bus_v, method = math.sqrt(2.0) * line_v, "line-peak"
    top_v = max(level_v - bus_v, 0.0)
    periods = 2.0 / (switching_frequency_hz * resistance_ohm * capacitance_f)  # 2T/RC
    mean_square = top_v**2 * -math.expm1(-periods) / periods
    return ClampFigures(
        clamp_level_v=level_v,
        bus_v=bus_v,
        bus_method=method,
        clamp_voltage_v=math.sqrt(mean_square),
        clamp_loss_w=mean_square / resistance_ohm,
    )


def analyze_capture(
    volts: np.ndarray,
    sample_interval_s: float,
    t0_s: float = 0.0,
    *,
    polarity: int = 1,
    settling_band: float = DEFAULT_SETTLING_BAND,
    full_scale_v: tuple[float, float] | None = None,
    clipped: np.ndarray | bool | None = None,
    snubber: SnubberBranch | None = None,
    rating_v: float | None = None,
    derating: float = DEFAULT_DERATING,
) -> CaptureFigures:
    """Analyse every turn-off edge of a switch-node record.

    Parameters
    ----------
    volts : samples in volts, uniformly spaced.
    sample_interval_s : sample spacing.
    t0_s : time of the first sample (the trigger is at t = 0; pre-trigger samples are negative).
    polarity : +1 when the node rises at turn-off (a MOSFET drain), -1 when it falls (a diode's
        reverse voltage); a falling record is analysed as its negative and reported in its own sign.
    settling_band : half-width of the settling band as a fraction of the step (IEEE 181, 5.7).
    full_scale_v : (low, high) limits of the digitiser; samples there count as clipped.
    clipped : a per-sample mask or a single flag from the caller, added to ``full_scale_v``.
    snubber : Rs–Cs branch and switching frequency, for the resistor loss.
    rating_v : voltage rating of the device at the node, for the stress margin.
    derating : fraction of ``rating_v`` the peak may use.

    Returns
    -------
    CaptureFigures

    Raises
    ------
    NoEdgeError
        When the record holds no transition from below 10 % to above 90 % of its range.
    ValueError
        For inputs outside their valid ranges.

    Notes
    -----
    Levels, reference instants, overshoot and settling follow IEEE Std 181-2011 (see
    :mod:`labseq.analysis.levels` and this module's notes on the plateau); ring frequency and
    damping come from :func:`labseq.analysis.ringfit.fit_ring`. Snubber resistor loss: when the
    record spans a switching period (after ``BRANCH_SETTLE_TIME_CONSTANTS``·Rs·Cs of branch
    start-up), the branch is driven by the measured voltage and Rs·i² is averaged over one
    period around each edge (method "waveform"); otherwise Cs·V²·fsw with V the edge's step
    (method "cv2f").
    """
    v = _check_inputs(volts, sample_interval_s, polarity, settling_band, rating_v, derating)
    clip, flagged = _clip_mask(v, full_scale_v, clipped)
    u = v if polarity == 1 else _Negated(v)
    base, top = histogram_state_levels(u)
    what = "rising" if polarity == 1 else "falling"
    if top <= base:
        raise NoEdgeError(f"no {what} turn-off edge: the record is flat at {base * polarity:g} V")
    changes = state_changes(
        u, reference_level(base, top, LOW_REFERENCE), reference_level(base, top, HIGH_REFERENCE)
    )
    noise_v = record_noise_rms_v(u) if snubber else 0.0
    rec = _Record(u, sample_interval_s, t0_s, clip, flagged, base, top, clip is not None, noise_v)

    durations = changes.rise_to - changes.rise_from
    fast = durations <= SLOW_SWING_FACTOR * max(2, durations.min(initial=u.size))
    spans = []
    for rise_from, first_high in zip(changes.rise_from[fast], changes.rise_to[fast], strict=True):
        next_fall = np.searchsorted(changes.fall_from, first_high)
        high_end = (
            int(changes.fall_from[next_fall]) if next_fall < changes.fall_from.size else u.size - 1
        )
        previous_low = np.searchsorted(changes.fall_to, rise_from, side="right") - 1
        search_from = int(changes.fall_to[previous_low]) if previous_low >= 0 else 0
        peak = _argmax(u, int(first_high), high_end + 1)
        if peak < u.size - 1:  # else the record ends before the peak
            spans.append(_Span(search_from, int(first_high), peak, high_end))
    edges: list[dict[str, float | bool | None]] = []
    fits: list[RingFit | None] = []
    for span, fit in zip(spans, _fit_dominant_rings(rec, spans), strict=True):
        figures = _edge(rec, span, fit, settling_band)
        if figures is not None:
            edges.append(figures)
            fits.append(fit if isinstance(fit, RingFit) else None)
    if not edges:
        raise NoEdgeError(
            f"no {what} turn-off edge: looked for a transition from below 10 % to above 90 % of "
            f"the range between the histogram levels {base * polarity:g} V and {top * polarity:g} V"
            " with its peak inside the record"
        )

    losses = _snubber_losses(rec, edges, snubber) if snubber else [(None, None)] * len(edges)
    results = []
    for figures, (loss_w, method) in zip(edges, losses, strict=True):
        peak_v = polarity * float(figures["peak_v"])
        margin = rating_v * derating - abs(peak_v) if rating_v is not None else None
        results.append(
            EdgeFigures(
                **{
                    **{
                        k: float(x) if isinstance(x, np.floating) else x for k, x in figures.items()
                    },
                    "base_v": polarity * base,
                    "plateau_v": polarity * float(figures["plateau_v"]),
                    "peak_v": peak_v,
                    "snubber_loss_w": loss_w,
                    "snubber_loss_method": method,
                    "stress_margin_v": margin,
                }
            )
        )
    worst = int(np.argmax([float(e["peak_v"]) for e in edges]))
    return CaptureFigures(
        edges=results,
        worst=results[worst],
        worst_index=worst,
        clipped=flagged or clip is not None,
        polarity=polarity,
        ring_fits=[fit if fit is None or polarity == 1 else fit.flipped() for fit in fits],
    )
