"""Peak memory of the long-record paths, in bytes per sample, against the record's own float64 size.

The record is the offline demo's acquisition as the simulated scope takes it (1 GS/s, 8-bit
codes, 100 kHz switching at 230 V rms and a quarter load: one turn-off edge, and one ring fit, per
10 000 samples, so a 10 M-sample record holds a thousand), the primary switch node on channel 1
and the output rectifier (a falling node) on channel 2. Three paths:

* analysis: ``analyze_capture`` of the primary's volts, given as float64 (and counted: 8
  B/sample), with the sequence's snubber, rating and settling band;
* runner: what the runner does with one acquisition of the sequence's two nodes: store their int8
  codes, then for each node convert its codes to volts (once), analyse them, take the RCD clamp's
  figures on the primary, and store the figures (:func:`labseq.runner.analyse_or_error`,
  :func:`labseq.runner.store_figures`), the codes counted;
* CSV: ``labseq analyze --json`` with the snubber, on the primary written as ``time_s,volts``: the
  reader and the analysis.

The reference, measured in the same run, is the record's own float64 size: the peak of making
its volts (8 B/sample; the CSV's two float64 columns are twice that). Targets at 10 M samples:
analysis ≤ 10 B/sample, runner ≤ 14 B/sample, and the CSV reader streams: ``analyze`` of a CSV
takes no more memory than the analysis of the volts themselves (≤ 10 B/sample, against the
file's 16 B/sample of float64).

Memory is counted two ways. tracemalloc counts numpy's and Python's allocations; it is exact and
repeats from run to run, so it is asserted. At ``make test``'s sizes (2 M and 3 M samples) a few
megabytes of every path do not grow with the record (a batch of ring fits, the histogram's
subsample, a block of parsed rows), so what is asserted there is the growth per added sample
between the two sizes, each size's peak per sample printed beside it; and that the CSV path's
peak at 2 M is the analysis' (the reader's own is below it). The 10 M case (``-m slow``) asserts
the peak per sample itself, and prints the resident-set high-water of a fresh process per path
(everything: BLAS buffers, SQLite, the interpreter's arenas), which moves by a few MB on a shared
machine and is not asserted.
"""

from __future__ import annotations

import dataclasses
import gc
import io
import json
import subprocess
import sys
import tracemalloc
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np
import pytest
from peak_memory import resident_high_water_available, resident_peak_bytes

from labseq.analysis import analyze_capture
from labseq.cli import main as labseq_main
from labseq.pipeline import analyse_or_error, analysis_options, store_figures
from labseq.runner import start_run
from labseq.sequence import Sequence, load_sequence
from labseq.store import CaptureRecord, Store
from labseq_instruments.roles import Waveform
from labseq_sim_instruments import scope
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackModel, load_dut

DEMO = Path(__file__).resolve().parents[2] / "labseq" / "examples" / "demo_offline_flyback.toml"
SIZES = (2_000_000, 3_000_000)
SLOW_SIZE = 10_000_000
#: Samples of the record a fresh process warms up on before its high-water is measured.
WARM_UP_SAMPLES = 100_000
#: Bytes per sample (in ``make test``: per added sample) each path may take.
TARGETS = {"analysis": 10.0, "runner": 14.0, "csv": 10.0}
#: What the CSV path's peak may exceed the analysis' by, per sample (a few Python objects).
CSV_OVER_ANALYSIS = 0.25
PATHS = ("float64", *TARGETS)
LINE_RMS_V, LOAD_A = 230.0, 0.6
SAMPLE_RATE_HZ = 1e9
SCALING = ("x_increment_s", "x_origin_s", "y_increment_v", "y_origin_v", "y_reference")


def acquisition(sequence: Sequence, samples: int) -> dict[str, Waveform]:
    """One simulated acquisition of every node of ``sequence``: int8 codes and their scaling."""
    design = load_dut(DEMO_DUTS["offline_ac"])
    model = FlybackModel(design)
    op = model.operating_point(LINE_RMS_V * 2**0.5, LOAD_A)
    settings = scope.AcquisitionSettings(
        timebase_s_per_div=samples / SAMPLE_RATE_HZ / 10,
        record_length=samples,
        trigger_channel=1,
        trigger_level_v=100.0,
        trigger_rising=True,
        trigger_position=0.1,
    )
    for node in sequence.nodes:
        settings = settings.with_channel(
            node.channel,
            display=True,
            scale_v_per_div=node.volts_per_div_v,
            offset_v=node.offset_v,
            probe_ratio=node.probe_ratio,
        )
    probes = {1: lambda t: model.switch_node_v(op, t), 2: lambda t: model.secondary_node_v(op, t)}
    period_s = 1 / design.switching_frequency_hz
    taken = scope.acquire(probes, period_s, settings, np.random.default_rng(7))
    assert taken is not None
    waveforms = {}
    for node in sequence.nodes:
        codes = np.frombuffer(taken.payload(node.channel, "INT8", False), dtype=np.int8)
        dt, t0, dv, v0 = scope.scaling(taken.settings, node.channel, "INT8")
        waveforms[node.name] = Waveform(codes.copy(), dt, t0, dv, v0, 0.0, -128, 127)
    return waveforms


def write_csv(path: Path, waveform: Waveform) -> None:
    """The capture as ``time_s,volts`` text, the shape of ``labseq export --captures csv``."""
    time_s, volts = waveform.time_s(), waveform.volts()
    with path.open("w", encoding="utf-8") as handle:
        handle.write("time_s,volts\n")
        for start in range(0, volts.size, 1 << 16):
            part = slice(start, start + (1 << 16))
            np.savetxt(handle, np.c_[time_s[part], volts[part]], fmt="%.10g", delimiter=",")


class Record:
    """One acquisition and its CSV in a directory, and the measured paths on it."""

    def __init__(self, directory: Path, sequence: Sequence, waveforms: dict[str, Waveform]):
        self.directory = directory
        self.sequence = sequence
        self.waveforms = waveforms
        self.primary = waveforms[sequence.primary.name]
        self.samples = self.primary.codes.size
        self.csv = directory / f"record-{self.samples}.csv"
        self.store = Store(directory / f"runner-{self.samples}.sqlite")
        self.point = self.store.points(start_run(sequence, self.store))[0]

    @classmethod
    def made(cls, directory: Path, samples: int, *, csv: bool = True) -> Record:
        """A new record of ``samples`` samples, saved (codes, and CSV) for a fresh process."""
        directory.mkdir(parents=True, exist_ok=True)
        sequence = load_sequence(DEMO)
        record = cls(directory, sequence, acquisition(sequence, samples))
        if csv:
            write_csv(record.csv, record.primary)
        arrays = {}
        for name, waveform in record.waveforms.items():
            arrays[f"{name}_codes"] = waveform.codes
            arrays[f"{name}_scaling"] = [getattr(waveform, key) for key in SCALING]
        np.savez(directory / f"record-{samples}.npz", **arrays)
        return record

    @classmethod
    def saved(cls, directory: Path, samples: int) -> Record:
        """The record :meth:`made` saved."""
        sequence = load_sequence(DEMO)
        waveforms = {}
        with np.load(directory / f"record-{samples}.npz") as arrays:
            for node in sequence.nodes:
                scaling = arrays[f"{node.name}_scaling"].tolist()
                codes = arrays[f"{node.name}_codes"]
                waveforms[node.name] = Waveform(codes, *scaling, -128, 127)
        return cls(directory, sequence, waveforms)

    def inputs(self, path: str) -> object:
        """What ``path`` starts from, made anew (so that it is counted with the path)."""
        if path == "analysis":
            return self.primary.volts()
        if path == "runner":
            return {
                name: dataclasses.replace(waveform, codes=waveform.codes.copy())
                for name, waveform in self.waveforms.items()
            }
        return None

    def run(self, path: str, given: object) -> None:
        """One pass of ``path`` on ``given`` (from :meth:`inputs`)."""
        if path == "float64":  # the reference: the record's volts as float64
            self.primary.volts()
        elif path == "analysis":
            options = analysis_options(self.sequence, self.sequence.primary)
            dt, t0 = self.primary.x_increment_s, self.primary.x_origin_s
            analyze_capture(given, dt, t0, **options)
        elif path == "runner":
            assert isinstance(given, dict)
            nodes = self.sequence.nodes
            records = [CaptureRecord(given[n.name], channel=n.channel, node=n.name) for n in nodes]
            ids = self.store.commit_point(self.point.id, captures=records, status=None)
            for node, capture_id in zip(nodes, ids, strict=True):
                result = analyse_or_error(self.sequence, given[node.name], node, self.point)
                assert not isinstance(result, Exception), result
                store_figures(self.store, capture_id, result)
        elif path == "csv":
            branch = self.sequence.primary.snubber
            assert branch is not None
            command = [
                "analyze",
                str(self.csv),
                "--json",
                f"--fsw={self.sequence.dut.switching_frequency_hz}",
                f"--cs={branch.capacitance_f}",
                f"--rs={branch.resistance_ohm}",
            ]
            with redirect_stdout(io.StringIO()) as out:
                labseq_main(command)
            assert json.loads(out.getvalue())["edges"]
        else:
            raise ValueError(f"unknown path {path!r}")


def traced_peak(record: Record, path: str) -> int:
    """tracemalloc's peak over one pass of ``path``, its inputs included."""
    gc.collect()
    tracemalloc.start()
    try:
        given = record.inputs(path)
        tracemalloc.reset_peak()
        record.run(path, given)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def resident_peak(directory: Path, samples: int, path: str) -> int | None:
    """Resident-set high-water that one pass of ``path`` adds to a fresh process, which has
    imported everything and warmed up on a short record first; None where the system does not
    tell it."""
    if not resident_high_water_available():
        return None
    child = [sys.executable, str(Path(__file__).resolve()), str(directory), str(samples), path]
    done = subprocess.run(child, capture_output=True, text=True, timeout=600, check=True)
    return int(done.stdout.split()[-1])


def _resident_peak_in_this_process(directory: Path, samples: int, path: str) -> int:
    warm = Record.saved(directory, WARM_UP_SAMPLES)
    warm.run(path, warm.inputs(path))
    record = Record.saved(directory, samples)
    given: list[object] = []
    inputs_bytes = resident_peak_bytes(lambda: given.append(record.inputs(path)))
    return inputs_bytes + resident_peak_bytes(lambda: record.run(path, given.pop()))


def per_sample(peak: int, reference: int, samples: int) -> str:
    return f"{peak / samples:6.2f} B/sample ({peak / reference:4.2f}× float64)"


@pytest.mark.benchmark
def test_memory_growth_per_sample_of_the_long_record_paths(tmp_path: Path) -> None:
    small, large = SIZES
    peaks = {}
    for samples in SIZES:
        record = Record.made(tmp_path, samples, csv=samples == small)
        paths = PATHS if samples == small else PATHS[:-1]
        peaks[samples] = {path: traced_peak(record, path) for path in paths}
        record.store.close()
    print("\npeak memory (tracemalloc) per sample, offline demo capture at 1 GS/s:")
    failures = []
    for path, target in TARGETS.items():
        shown = []
        for samples, figures in peaks.items():
            if path in figures:
                reference = figures["float64"] * (2 if path == "csv" else 1)
                peak = per_sample(figures[path], reference, samples)
                shown.append(f"{samples // 1_000_000} M: {peak}")
        if path == "csv":
            over = (peaks[small]["csv"] - peaks[small]["analysis"]) / small
            verdict = f"over the analysis {over:+.2f} B/sample (target ≤ {CSV_OVER_ANALYSIS:g})"
            failed = over > CSV_OVER_ANALYSIS
        else:
            growth = (peaks[large][path] - peaks[small][path]) / (large - small)
            verdict = f"growth {growth:5.2f} B/sample (target ≤ {target:g})"
            failed = growth > target
        print(f"  {path:<9} {'; '.join(shown)}; {verdict}")
        if failed:
            failures.append(path)
    assert not failures, f"over target: {failures}"


@pytest.mark.slow  # a 10 M-sample record and its CSV, each path measured twice: over a minute
@pytest.mark.benchmark
def test_peak_memory_per_sample_at_ten_million_samples(tmp_path: Path) -> None:
    Record.made(tmp_path, WARM_UP_SAMPLES).store.close()
    record = Record.made(tmp_path, SLOW_SIZE)
    traced = {path: traced_peak(record, path) for path in PATHS}
    record.store.close()
    resident = {path: resident_peak(tmp_path, SLOW_SIZE, path) for path in PATHS}
    print(f"\npeak memory per sample, {SLOW_SIZE:,}-sample offline demo capture at 1 GS/s:")
    failures = []
    for path in PATHS:
        factor = 2 if path == "csv" else 1
        target = TARGETS.get(path)
        traced_text = per_sample(traced[path], traced["float64"] * factor, SLOW_SIZE)
        peak, reference = resident[path], resident["float64"]
        resident_text = (
            "not measured here"
            if peak is None or reference is None
            else per_sample(peak, reference * factor, SLOW_SIZE)
        )
        print(
            f"  {path:<9} tracemalloc {traced_text}, resident {resident_text}"
            + (f" (target ≤ {target:g})" if target else "")
        )
        if target and traced[path] / SLOW_SIZE > target:
            failures.append(path)
    assert not failures, f"over target: {failures}"


if __name__ == "__main__":  # a fresh process measuring one path: DIRECTORY SAMPLES PATH
    print(_resident_peak_in_this_process(Path(sys.argv[1]), int(sys.argv[2]), sys.argv[3]))
