"""Long records are read and analysed a block at a time without changing a figure.

The analysis reads a record's long stretches in blocks (``levels.BLOCK_SAMPLES``), steps the
snubber branch through it block by block keeping the power only in the loss windows, turns a
falling record over slice by slice, and fits rings in batches (``ringfit.FIT_BATCH``); the text
reader parses a file in blocks of rows and checks its times as they pass. Each must give what one
pass over the whole record gives. Here the same records with many edges are analysed with blocks
and batches larger than anything in them (one pass over everything, the way the analysis worked
before it went block by block) and with small ones (hundreds of block boundaries, falling inside
edges, rings, plateaus and loss windows), and compared; the primitives are compared with their
plain whole-array forms. Everything is bit for bit the same but the snubber loss of a window
longer than a block, whose trapezoidal sum is added block by block: equal within rounding.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from waveforms import flyback_node, quantise

import labseq.waveform_files.record as record_module
import labseq.waveform_files.text as text_module
from labseq.analysis import SnubberBranch, analyze_capture, capture, levels, ringfit, snubber
from labseq.analysis.capture import clamp_figures
from labseq.analysis.levels import last_band_entry, state_changes
from labseq.analysis.snubber import (
    branch_period_means_w,
    branch_resistor_power_w,
    period_means_w,
)
from labseq.errors import InputError
from labseq.waveform_files import check_uniform, read_waveform
from labseq_sim_instruments import scope
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackModel, load_dut

#: Small blocks and batches: a prime, so that boundaries fall everywhere in the record.
SMALL_BLOCK, SMALL_BATCH = 997, 5
#: Larger than anything in the records: one pass, one batch.
WHOLE_BLOCK, WHOLE_BATCH = 1 << 40, 1 << 30


def set_blocks(monkeypatch: pytest.MonkeyPatch, block: int, batch: int) -> None:
    for module in (levels, capture, snubber):
        monkeypatch.setattr(module, "BLOCK_SAMPLES", block)
    monkeypatch.setattr(ringfit, "FIT_BATCH", batch)


def flat(value: object, path: str = "") -> dict[str, object]:
    """Every number of a result, by its path (dicts, lists and dataclasses opened up)."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        value = dataclasses.asdict(value)
    if isinstance(value, dict):
        return {k: v for key, item in value.items() for k, v in flat(item, f"{path}.{key}").items()}
    if isinstance(value, list | tuple):
        return {k: v for i, item in enumerate(value) for k, v in flat(item, f"{path}[{i}]").items()}
    return {path: value}


def assert_same(whole: object, blocks: object) -> None:
    """Bit for bit the same, but snubber losses: within rounding."""
    a, b = flat(whole), flat(blocks)
    assert a.keys() == b.keys()
    for key, value in a.items():
        if key.endswith("snubber_loss_w") and value is not None:
            assert b[key] == pytest.approx(value, rel=1e-13, abs=0), key
        else:
            assert b[key] == value, key


BRANCH = SnubberBranch(rs_ohm=47.0, cs_f=470e-12, fsw_hz=150e3)


def synthetic_record(clip: bool) -> tuple[np.ndarray, float, float, dict[str, object]]:
    """29 turn-off edges at 5 GS/s (loss windows of 33 333 samples: 34 blocks each), noisy and
    quantised; clipped at the top of a 500 V screen when asked."""
    t = np.arange(950_000) / 5e9 - 1e-6
    noisy = flyback_node(t, ring_amps_v=(90.0, 60.0, 120.0)) + np.random.default_rng(3).normal(
        0, 1.0, t.size
    )
    if not clip:
        return quantise(noisy), 2e-10, float(t[0]), {"snubber": BRANCH, "rating_v": 650.0}
    top = 500.0 - 550.0 / 256
    volts = quantise(noisy, low_v=-50.0, high_v=500.0)
    return volts, 2e-10, float(t[0]), {"snubber": BRANCH, "full_scale_v": (-50.0, top)}


def offline_acquisition() -> dict[int, tuple[np.ndarray, float, float]]:
    """The offline demo at 230 V rms and a quarter load, both nodes, 1 GS/s, 600 000 samples
    (59 turn-off edges of the primary, 23 of the rectifier, each node's volts from 8-bit codes)."""
    design = load_dut(DEMO_DUTS["offline_ac"])
    model = FlybackModel(design)
    op = model.operating_point(230.0 * math.sqrt(2.0), 0.6)
    settings = (
        scope.AcquisitionSettings(
            timebase_s_per_div=6e-5,
            record_length=600_000,
            trigger_channel=1,
            trigger_level_v=100.0,
            trigger_rising=True,
            trigger_position=0.1,
        )
        .with_channel(1, display=True, scale_v_per_div=80.0, offset_v=300.0, probe_ratio=100.0)
        .with_channel(2, display=True, scale_v_per_div=20.0, offset_v=-60.0, probe_ratio=10.0)
    )
    probes = {1: lambda t: model.switch_node_v(op, t), 2: lambda t: model.secondary_node_v(op, t)}
    taken = scope.acquire(probes, 1e-5, settings, np.random.default_rng(5))
    assert taken is not None
    records = {}
    for channel in (1, 2):
        codes = np.frombuffer(taken.payload(channel, "INT8", False), dtype="i1").astype(float)
        dt, t0, dv, v0 = scope.scaling(taken.settings, channel, "INT8")
        records[channel] = (codes * dv + v0, dt, t0)
    return records


@pytest.mark.parametrize("clip", [False, True], ids=["unclipped", "clipped at full scale"])
def test_synthetic_record_of_many_edges_block_by_block(
    monkeypatch: pytest.MonkeyPatch, clip: bool
) -> None:
    volts, dt, t0, options = synthetic_record(clip)
    results = []
    for block, batch in ((WHOLE_BLOCK, WHOLE_BATCH), (SMALL_BLOCK, SMALL_BATCH)):
        set_blocks(monkeypatch, block, batch)
        figures = analyze_capture(volts, dt, t0, **options)
        results.append((figures.as_dict(), figures.ring_fits))
    assert len(results[0][0]["edges"]) == 29
    assert results[0][0]["clipped"] is clip
    assert_same(*results)


def test_offline_acquisition_with_clamp_and_falling_node_block_by_block(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    records = offline_acquisition()
    design = load_dut(DEMO_DUTS["offline_ac"])
    primary = SnubberBranch(470.0, 47e-12, design.switching_frequency_hz)
    secondary = SnubberBranch(47.0, 470e-12, design.switching_frequency_hz)
    results = []
    for block, batch in ((WHOLE_BLOCK, WHOLE_BATCH), (SMALL_BLOCK, SMALL_BATCH)):
        set_blocks(monkeypatch, block, batch)
        volts, dt, t0 = records[1]
        figures = analyze_capture(volts, dt, t0, snubber=primary, rating_v=650.0)
        clamp = clamp_figures(
            volts,
            dt,
            t0,
            figures,
            resistance_ohm=47e3,
            capacitance_f=4.7e-9,
            switching_frequency_hz=design.switching_frequency_hz,
            line_v=230.0,
            line_is_ac=True,
        )
        volts, dt, t0 = records[2]
        falling = analyze_capture(volts, dt, t0, polarity=-1, snubber=secondary, rating_v=200.0)
        results.append(
            (figures.as_dict(), figures.ring_fits, clamp, falling.as_dict(), falling.ring_fits)
        )
    whole = results[0]
    assert len(whole[0]["edges"]) == 59 and len(whole[3]["edges"]) == 23
    assert whole[2] is not None and whole[2].bus_method == "valley-ring"
    assert_same(*results)


def test_falling_record_turned_slice_by_slice_as_its_negative() -> None:
    # The falling record is analysed as −v: the same figures as its negated copy analysed as a
    # rising one, in the falling record's own sign.
    volts, dt, t0, options = synthetic_record(clip=False)
    rising = analyze_capture(volts, dt, t0, **options)
    falling = analyze_capture(-volts, dt, t0, polarity=-1, **options)
    signed = {"base_v", "plateau_v", "peak_v"}
    for up, down in zip(rising.edges, falling.edges, strict=True):
        for name, value in up.as_dict().items():
            assert getattr(down, name) == (-value if name in signed else value), name
    assert [None if f is None else f.flipped() for f in rising.ring_fits] == falling.ring_fits


def test_transitions_and_band_entry_match_their_whole_array_forms(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    rng = np.random.default_rng(9)
    levels_v = np.repeat(rng.integers(0, 2, 400) * 10.0, rng.integers(1, 60, 400))
    v = levels_v + rng.normal(0, 1.5, levels_v.size)
    monkeypatch.setattr(levels, "BLOCK_SAMPLES", 97)

    def runs(mask: np.ndarray) -> tuple[list[int], list[int]]:
        """First and last index of every run of True, from the whole mask at once."""
        toggles = np.flatnonzero(mask[1:] != mask[:-1]) + 1
        bounds = np.concatenate(([0] if mask[0] else [], toggles, [mask.size] if mask[-1] else []))
        return bounds[0::2].astype(int).tolist(), (bounds[1::2].astype(int) - 1).tolist()

    for inside in (lambda x: x >= 8.0, lambda x: x <= 2.0, lambda x: x > -99.0):
        starts, ends = levels._runs(v, inside)
        assert (starts.tolist(), ends.tolist()) == runs(inside(v))
    assert state_changes(v, 2.0, 8.0).rise_to.size > 100
    for start, stop in ((0, v.size), (150, 5000), (3, 2000), (7, 8)):
        segment = v[start:stop] - 10.0
        outside = np.abs(segment) > 1.0
        if outside[-1]:
            expected = None
        elif not outside.any():
            expected = float(start)
        else:
            i = int(np.flatnonzero(outside)[-1])
            edge = 1.0 if segment[i] > 0 else -1.0
            expected = start + i + (edge - segment[i]) / (segment[i + 1] - segment[i])
        assert last_band_entry(v, 10.0, 1.0, start, stop) == expected


def test_branch_loss_windows_match_the_record_long_power(monkeypatch: pytest.MonkeyPatch) -> None:
    volts, dt, t0, _ = synthetic_record(clip=False)
    period_s = BRANCH.period_s
    # Windows in order, overlapping, repeated and out of order, at the record's start and end.
    starts_s = np.array([0.0, 3e-6, 3e-6, 1e-5, 0.4e-5, 2.5e-5, 1e-5 + period_s / 2, 1.0])
    reference = period_means_w(branch_resistor_power_w(volts, dt, BRANCH), dt, starts_s, period_s)
    monkeypatch.setattr(snubber, "BLOCK_SAMPLES", 1 << 20)  # every window in one block
    assert branch_period_means_w(volts, dt, BRANCH, starts_s).tolist() == reference.tolist()
    monkeypatch.setattr(snubber, "BLOCK_SAMPLES", SMALL_BLOCK)
    np.testing.assert_allclose(
        branch_period_means_w(volts, dt, BRANCH, starts_s), reference, rtol=1e-13, atol=0
    )


def old_check_uniform(time_s: np.ndarray) -> str | tuple[float, float]:
    """check_uniform's time checks on the whole column at once (its form before it went block by
    block): the error's text, or (interval, t0)."""
    if not np.isfinite(time_s).all():
        bad = np.flatnonzero(~np.isfinite(time_s))
        return f"{bad.size} missing or non-finite value(s), first at row {int(bad[0]) + 1}"
    deviation = np.diff(time_s)
    if deviation.min() <= 0:
        return f"does not increase at row {int(np.argmax(deviation <= 0)) + 2}"
    interval = (time_s[-1] - time_s[0]) / (time_s.size - 1)
    deviation = np.abs(deviation - interval)
    worst = int(np.argmax(deviation))
    if deviation[worst] > record_module.UNIFORM_TOLERANCE * interval:
        return f"the step at row {worst + 2} is {time_s[worst + 1] - time_s[worst]:.6g} s"
    return float(interval), float(time_s[0])


@pytest.mark.parametrize(
    "spoil",
    ["none", "nan", "backward", "long step", "short step", "long then short", "short then long"],
)
def test_times_checked_block_by_block_as_on_the_whole_column(
    monkeypatch: pytest.MonkeyPatch, spoil: str
) -> None:
    monkeypatch.setattr(record_module, "CHECK_BLOCK_SAMPLES", 61)
    step_s = 2.0**-30  # about 1 ns, and exact: a long and a short step can deviate equally
    time_s = (np.arange(5000) - 200) * step_s
    if spoil == "nan":
        time_s[[1830, 4000]] = np.nan
    elif spoil == "backward":
        time_s[3660] = time_s[3659]  # at a block boundary: steps across blocks are checked too
    elif spoil == "long step":
        time_s[2440:] += 0.3 * step_s
    elif spoil == "short step":
        time_s[1220:] -= 0.3 * step_s
    elif spoil == "long then short":  # equal deviations: the first is named
        time_s[3000] += 0.5 * step_s
    elif spoil == "short then long":
        time_s[3000] -= 0.5 * step_s
    expected = old_check_uniform(time_s)
    volts = np.zeros(time_s.size)
    if isinstance(expected, str):
        with pytest.raises(InputError) as error:
            check_uniform("f.csv", time_s, volts)
        assert expected in str(error.value)
    else:
        waveform = check_uniform("f.csv", time_s, volts)
        assert (waveform.sample_interval_s, waveform.t0_s) == expected


@pytest.mark.parametrize("shape", ["time_s,volts", "decimal commas", "trailing delimiter"])
def test_text_read_block_by_block_holds_the_samples_of_the_file(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path, shape: str
) -> None:
    monkeypatch.setattr(text_module, "BLOCK_ROWS", 333)
    time_s = np.arange(20_000) * 5e-10 - 1e-6
    volts = np.round(np.random.default_rng(2).normal(200.0, 90.0, time_s.size), 3)
    rows = [f"{t!r},{v!r}" for t, v in zip(time_s.tolist(), volts.tolist(), strict=True)]
    path = tmp_path / "record.csv"
    if shape == "decimal commas":
        rows = [row.replace(",", ";").replace(".", ",") for row in rows]
    elif shape == "trailing delimiter":
        rows = [row + "," for row in rows]
    path.write_text("time_s,volts\n" + "\n".join(rows) + "\n", encoding="utf-8")
    waveform = read_waveform(path)
    assert waveform.volts.tolist() == volts.tolist()
    assert waveform.t0_s == time_s[0]
    assert waveform.sample_interval_s == (time_s[-1] - time_s[0]) / (time_s.size - 1)
