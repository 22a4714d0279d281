"""State levels, transitions, reference-level instants and settling, as IEEE Std 181 defines them.

IEEE Std 181-2011 ("Transitions, Pulses, and Related Waveforms"; IEC 60469:2013 has the same
definitions) describes a two-state waveform by its state levels, found from a histogram of the
samples; the reference levels (10 %, 50 %, 90 % of the step between the states); the instants at
which the waveform crosses them (linear interpolation between samples); overshoot relative to the
step; and settling as the last entry into a tolerance band around the final state.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

#: Histogram bins across the record's range (IEEE 181 leaves the number to the user; 256 matches
#: an 8-bit scope and resolves a 12-bit one to 1/16 of its span).
HISTOGRAM_BINS = 256
#: Samples used for a histogram; longer records are decimated (a histogram measures time spent
#: at each level, which a regular subsample preserves).
HISTOGRAM_MAX_SAMPLES = 1 << 17

LOW_REFERENCE = 0.1
MID_REFERENCE = 0.5
HIGH_REFERENCE = 0.9
#: Samples handled at a time by a pass over a long stretch of a record (transitions, searches,
#: the snubber branch): a 64 Ki-sample block keeps every temporary near half a megabyte, so a
#: 10-million-sample record is analysed with little more memory than its samples take.
BLOCK_SAMPLES = 1 << 16


def subsample_stride(samples: int, max_samples: int) -> int:
    """Stride of a regular subsample of at most ``max_samples`` out of ``samples``."""
    return max(1, -(-samples // max_samples))


def _subsample(volts: np.ndarray, max_samples: int = HISTOGRAM_MAX_SAMPLES) -> np.ndarray:
    """A regular subsample of at most ``max_samples`` samples (taken before any conversion, so
    that only the subsample is converted)."""
    return volts[:: subsample_stride(volts.size, max_samples)]


def _mode_of(samples: np.ndarray, lo: float, hi: float, bins: int) -> float:
    """Mode of ``samples`` in [lo, hi]: mean of the samples in the fullest bin and its neighbours.

    Averaging the fullest bin with its two neighbours removes the bin-width quantisation of a bare
    bin centre while keeping the estimate local to the mode. Bins are equal-width, half-open
    except the last (as ``numpy.histogram`` counts them), computed with ``numpy.bincount``.
    """
    index = ((samples - lo) * (bins / (hi - lo))).astype(np.intp)
    np.clip(index, 0, bins - 1, out=index)
    peak = int(np.argmax(np.bincount(index, minlength=bins)))
    return float(np.mean(samples[(index >= peak - 1) & (index <= peak + 1)]))


def histogram_mode(
    samples: np.ndarray, bins: int = HISTOGRAM_BINS, max_samples: int = HISTOGRAM_MAX_SAMPLES
) -> float:
    """Most frequent level of ``samples`` (histogram mode refined by the neighbouring bins),
    from a regular subsample of at most ``max_samples`` of them."""
    x = np.asarray(_subsample(samples, max_samples), dtype=float)
    lo, hi = float(np.min(x)), float(np.max(x))
    if hi == lo:
        return lo
    return _mode_of(x, lo, hi, bins)


def otsu_threshold(samples: np.ndarray, lo: float, hi: float, bins: int) -> float:
    """Level that splits ``samples`` into two classes of maximal between-class variance.

    Otsu, N., "A threshold selection method from gray-level histograms", IEEE Transactions on
    Systems, Man, and Cybernetics 9(1), 1979: over the histogram's bin edges, maximise
    w0·w1·(μ0 − μ1)², with w the class weights and μ the class means.
    """
    width = (hi - lo) / bins
    index = ((samples - lo) / width).astype(np.intp)
    np.clip(index, 0, bins - 1, out=index)
    counts = np.bincount(index, minlength=bins).astype(float)
    centres = lo + (np.arange(bins) + 0.5) * width
    w0 = np.cumsum(counts)[:-1]
    m0 = np.cumsum(counts * centres)[:-1]
    w1 = counts.sum() - w0
    valid = (w0 > 0) & (w1 > 0)
    mu0 = np.divide(m0, w0, out=np.zeros_like(m0), where=valid)
    mu1 = np.divide(m0[-1] + counts[-1] * centres[-1] - m0, w1, out=np.zeros_like(m0), where=valid)
    between = np.where(valid, w0 * w1 * (mu0 - mu1) ** 2, -1.0)
    return lo + (int(np.argmax(between)) + 1) * width


def histogram_state_levels(volts: np.ndarray, bins: int = HISTOGRAM_BINS) -> tuple[float, float]:
    """Low and high state levels of a two-state record by the histogram mode method.

    Parameters
    ----------
    volts : record samples.
    bins : histogram bins across the record's range.

    Returns
    -------
    (low_v, high_v) : mode of the lower and of the upper part of the histogram.

    Notes
    -----
    IEEE Std 181-2011, 5.2.1.3 (mode method): the histogram is split in two and each state level
    is the mode of its part. The standard splits at the middle of the record's range; a switch
    node's ring can overshoot the plateau by as much as the step itself, which drags the middle
    up to the plateau and puts both states in the lower part. The split here is Otsu's threshold
    (:func:`otsu_threshold`), which falls between the two populous states however far the ring
    reaches; on a record without overshoot both splits give the same two modes.
    """
    x = np.asarray(_subsample(volts), dtype=float)
    lo, hi = float(np.min(x)), float(np.max(x))
    if hi == lo:
        return lo, hi
    split = otsu_threshold(x, lo, hi, bins)
    half_bins = max(1, bins // 2)
    return (
        _mode_of(x[x < split], lo, split, half_bins),
        _mode_of(x[x >= split], split, hi, half_bins),
    )


def reference_level(low_v: float, high_v: float, fraction: float) -> float:
    """Level at ``fraction`` of the step from ``low_v`` to ``high_v`` (IEEE 181, 5.3.1)."""
    return low_v + fraction * (high_v - low_v)


@dataclass(frozen=True)
class StateChanges:
    """Transitions between the low and high states found with hysteresis.

    Each rising transition k goes from sample ``rise_from[k]`` (the last at or below the low
    reference) to ``rise_to[k]`` (the first at or above the high reference); falling transitions
    likewise go from ``fall_from`` (last at or above the high reference) to ``fall_to``.
    """

    rise_from: np.ndarray
    rise_to: np.ndarray
    fall_from: np.ndarray
    fall_to: np.ndarray


def _runs(
    volts: np.ndarray, inside: Callable[[np.ndarray], np.ndarray]
) -> tuple[np.ndarray, np.ndarray]:
    """First and last index of every run of samples for which ``inside`` is True.

    ``inside`` maps samples to booleans; it is applied a block at a time, each block overlapping
    the one before by a sample, so no record-long boolean array is made.
    """
    toggles = []
    for start in range(0, volts.size, BLOCK_SAMPLES):
        first = max(start - 1, 0)
        mask = inside(volts[first : start + BLOCK_SAMPLES])
        toggles.append(np.flatnonzero(mask[1:] != mask[:-1]) + (first + 1))
    opens, closes = bool(inside(volts[:1])[0]), bool(inside(volts[-1:])[0])
    bounds = np.concatenate(([0] if opens else [], *toggles, [volts.size] if closes else []))
    bounds = bounds.astype(np.intp)
    return bounds[0::2], bounds[1::2] - 1


def state_changes(volts: np.ndarray, low_ref_v: float, high_ref_v: float) -> StateChanges:
    """Find every change between the states with hysteresis between two reference levels.

    A sample at or below ``low_ref_v`` is in the low state, one at or above ``high_ref_v`` in the
    high state; samples in between keep the previous state, so ringing that stays between the
    references is not a transition. Vectorised on runs: the record is reduced to its runs of
    low-state and of high-state samples, in order, and a change is a low run followed by a high
    run (rising) or the reverse (falling).
    """
    high_starts, high_ends = _runs(volts, lambda v: v >= high_ref_v)
    low_starts, low_ends = _runs(volts, lambda v: v <= low_ref_v)
    starts = np.concatenate((high_starts, low_starts))
    order = np.argsort(starts, kind="stable")
    starts, ends = starts[order], np.concatenate((high_ends, low_ends))[order]
    high = (order < high_starts.size).view(np.int8)
    change = np.flatnonzero(high[1:] != high[:-1])
    rising = change[high[change + 1] > 0]
    falling = change[high[change + 1] == 0]
    return StateChanges(ends[rising], starts[rising + 1], ends[falling], starts[falling + 1])


def last_upward_crossing(volts: np.ndarray, level_v: float, start: int, stop: int) -> float | None:
    """Fractional sample index of the last upward crossing of ``level_v`` in ``volts[start:stop]``.

    The instant is interpolated linearly between the two samples that straddle the level, as
    IEEE Std 181-2011, 5.3.3 does for reference-level instants. None when there is no crossing.
    Searched backwards from ``stop`` in chunks that double in length up to ``BLOCK_SAMPLES``,
    since the crossing of interest is usually close to it.
    """
    chunk = 256
    end = stop
    while end - start >= 2:
        begin = max(start, end - chunk)
        segment = np.asarray(volts[begin:end], dtype=float)
        below = segment < level_v
        ups = np.flatnonzero(below[:-1] & ~below[1:])
        if ups.size:
            i = int(ups[-1])
            v0, v1 = segment[i], segment[i + 1]
            return begin + i + (level_v - v0) / (v1 - v0)
        # overlap one sample: a crossing may straddle chunks
        end, chunk = begin + 1, min(2 * chunk, BLOCK_SAMPLES)
    return None


def last_band_entry(
    volts: np.ndarray, centre_v: float, half_width_v: float, start: int, stop: int
) -> float | None:
    """Fractional index at which ``volts[start:stop]`` last enters ``centre_v ± half_width_v``.

    Returns ``start`` when the segment is inside the band throughout and None when it ends
    outside (it has not settled by ``stop``). The entry instant is interpolated on the band edge
    that was crossed (IEEE Std 181-2011, 5.7: settling time ends at the last entry into the band).
    The last sample outside is searched backwards from ``stop`` a block at a time.
    """
    stop = min(stop, volts.size)
    if stop <= start or abs(float(volts[stop - 1]) - centre_v) > half_width_v:
        return None
    end = stop
    while end > start:
        begin = max(start, end - BLOCK_SAMPLES)
        # the block and the sample after it, which an entry at the block's end is interpolated to
        segment = np.asarray(volts[begin : min(end + 1, stop)], dtype=float) - centre_v
        outside = np.flatnonzero(np.abs(segment[: end - begin]) > half_width_v)
        if outside.size:
            i = int(outside[-1])
            edge = half_width_v if segment[i] > 0 else -half_width_v
            return begin + i + (edge - segment[i]) / (segment[i + 1] - segment[i])
        end = begin
    return float(start)
