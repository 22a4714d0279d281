"""Per-point aggregation and verdicts."""

from __future__ import annotations

import statistics

import pytest

from labseq.analysis import Limits, aggregate, judge


def capture(**figures: object) -> dict[str, object]:
    base = {"peak_v": 500.0, "damping_ratio": 0.3, "q_factor": 1.7, "clipped": False}
    return {**base, **figures}


def test_aggregate_worst_mean_and_sample_spread() -> None:
    peaks = [480.0, 512.0, 497.0]
    zetas = [0.31, 0.27, 0.35]
    point = aggregate(
        [capture(peak_v=p, damping_ratio=z) for p, z in zip(peaks, zetas, strict=True)]
    )
    assert point.figures["peak_v"].worst == 512.0  # worst peak is the highest
    assert point.figures["damping_ratio"].worst == 0.27  # worst damping is the lowest
    # Python's statistics module is the reference for the mean and sample standard deviation.
    assert point.figures["peak_v"].mean == pytest.approx(statistics.mean(peaks))
    assert point.figures["peak_v"].spread == pytest.approx(statistics.stdev(peaks))
    assert point.n_captures == 3 and point.n_clipped == 0


def test_missing_values_are_skipped_not_counted() -> None:
    point = aggregate([capture(damping_ratio=None), capture(damping_ratio=0.4)])
    assert point.figures["damping_ratio"].count == 1
    assert point.figures["damping_ratio"].spread is None


def test_pass_when_every_limit_holds() -> None:
    point = aggregate([capture(), capture(peak_v=510.0)])
    verdict = judge(point, Limits(max_peak_v=600.0, min_damping_ratio=0.2), efficiency=0.88)
    assert verdict.status == "pass" and verdict.reasons == []


def test_fail_reasons_name_figure_value_and_limit() -> None:
    point = aggregate([capture(peak_v=612.0, snubber_loss_w=0.125)])
    verdict = judge(
        point, Limits(max_peak_v=600.0, max_snubber_loss_w=0.1, min_efficiency=0.9), efficiency=0.87
    )
    assert verdict.status == "fail"
    # reasons in words with units: the figure's title, never its key; a ratio as a plain number
    assert "peak stress 612 V breaks limit ≤ 600 V" in verdict.reasons
    assert "snubber loss 125 mW breaks limit ≤ 100 mW" in verdict.reasons
    assert "efficiency 87 % breaks limit ≥ 90 %" in verdict.reasons
    low = judge(aggregate([capture(damping_ratio=0.0266)]), Limits(min_damping_ratio=0.1))
    assert low.reasons == ["damping ratio 0.0266 breaks limit ≥ 0.1"]


def test_incomplete_without_captures_or_a_fit() -> None:
    empty = judge(aggregate([]), Limits(max_peak_v=600.0))
    assert empty.status == "incomplete"
    assert empty.reasons == ["peak stress: no captures analysed; limit ≤ 600 V"]
    no_fit = judge(aggregate([capture(damping_ratio=None)]), Limits(min_damping_ratio=0.2))
    assert no_fit.status == "incomplete" and "damping ratio: not determined" in no_fit.reasons[0]
    assert no_fit.reasons[0].endswith("limit ≥ 0.2")
    no_meter = judge(aggregate([capture()]), Limits(min_efficiency=0.85), efficiency=None)
    assert no_meter.status == "incomplete"


def test_clipped_peak_cannot_pass_but_can_fail() -> None:
    clipped = aggregate([capture(peak_v=480.0, clipped=True)])
    unproven = judge(clipped, Limits(max_peak_v=600.0))
    assert unproven.status == "incomplete" and "only a bound" in unproven.reasons[0]
    assert judge(clipped, Limits(max_peak_v=450.0)).status == "fail"
    assert judge(clipped, Limits(min_damping_ratio=0.2)).status == "pass"  # ζ is not bounded
