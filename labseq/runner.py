"""The unattended line × load sweep: order of operations, point errors, safe shutdown, resume.

Order at the bench, as a technician would do it by hand: put the bench safe (a run killed earlier
may have left outputs on), set the source's current limit, load off, source to the first line
value, output on; within each line value step the load through its values (so line changes are
few), settle, arm the scope and capture N times, read the meter, store; between line values ramp
the source in steps no larger than the declared line step. Every exit — finished, point error with
``abort``, SIGINT/SIGTERM, any exception — ends in :func:`labseq.bench.make_safe`.

Each capture is committed on its own as soon as it is fetched; the point's readings and "done"
state are committed with its last capture, so a run killed at any instant (even by SIGKILL) loses
no capture, and ``labseq resume`` takes only what is missing. Analysis runs on a worker thread
while the next capture is acquired, so it does not slow the sweep down.
"""

from __future__ import annotations

import socket
import sqlite3
import time
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import AbstractContextManager, contextmanager
from dataclasses import dataclass, field

from labseq.bench import Bench, SafeReport, lock_names, make_safe, open_bench
from labseq.errors import EXIT_FAILURE, EXIT_OK, LabseqError
from labseq.locks import run_locks
from labseq.pipeline import analyse_or_error, analyse_run, judge_stored_point, store_figures
from labseq.progress import Progress
from labseq.safety import SAFE_BUS_V, Interrupted, SignalLatch, signal_exit_code
from labseq.sequence import Sequence
from labseq.store import (
    CaptureRecord,
    PointReadings,
    PointRecord,
    RunRecord,
    Store,
    StoreError,
    store_failure,
)
from labseq.units import format_si
from labseq_instruments import Waveform
from labseq_instruments.errors import InstrumentError, ScpiError

#: How often the scope is asked whether its single acquisition is in.
ACQUISITION_POLL_S = 0.005
#: Exit status of a run whose end could not be confirmed safe (it overrides every other one).
UNSAFE_END_EXIT = EXIT_FAILURE


class PointAbort(LabseqError):
    """A point failed and the sequence says ``on_point_error = "abort"``."""


class RunStateError(LabseqError):
    """The run cannot be resumed: it is still running in another process."""

    exit_code = 2


@dataclass
class Timings:
    """Wall time by activity, for the runner-overhead benchmark and the run's event log."""

    seconds: dict[str, float] = field(default_factory=dict)

    def add(self, activity: str, seconds: float) -> None:
        self.seconds[activity] = self.seconds.get(activity, 0.0) + seconds

    @contextmanager
    def charge(self, activity: str) -> Iterator[None]:
        """Charge the wall time of the block to ``activity``."""
        start = time.perf_counter()
        try:
            yield
        finally:
            self.add(activity, time.perf_counter() - start)


@dataclass(frozen=True)
class RunOutcome:
    """How a run ended."""

    run_id: int
    status: str  # finished | aborted | interrupted | failed | unsafe-end
    points_done: int
    points_total: int
    safe: SafeReport | None
    timings: Timings
    wall_s: float
    signal_name: str | None = None  # the signal that ended the run, if one did

    @property
    def exit_code(self) -> int:
        """:data:`UNSAFE_END_EXIT` when the bench could not be confirmed safe; after a signal,
        128 + its number (130 SIGINT, 143 SIGTERM, 129 SIGHUP); 0 when every point is done;
        else 3 (the bench or an instrument failed; 1 is kept for a judgement)."""
        if self.status == "unsafe-end":
            return UNSAFE_END_EXIT
        if self.status == "interrupted":
            return signal_exit_code(self.signal_name or "SIGINT")
        complete = self.status == "finished" and self.points_done == self.points_total
        return EXIT_OK if complete else EXIT_FAILURE


class Sweep:
    """Walks the pending points of one run on an opened bench."""

    def __init__(
        self,
        sequence: Sequence,
        store: Store,
        run_id: int,
        bench: Bench,
        progress: Progress,
        timings: Timings,
    ) -> None:
        self.sequence = sequence
        self.store = store
        self.run_id = run_id
        self.bench = bench
        self.progress = progress
        self.timings = timings
        self.line_v: float | None = None  # the line value the source is at, None = output off
        self.analysis = ThreadPoolExecutor(max_workers=1, thread_name_prefix="analysis")
        self.pending_figures: list[tuple[int, int, Future]] = []  # (point, capture, analysis)
        self.points_to_judge: set[int] = set()

    # -- bench actions; instrument calls are charged to "instrument" time -------------------

    def log(self, kind: str, message: str, point_id: int | None = None, **data: object) -> None:
        self.store.log_event(self.run_id, kind, message, point_id=point_id, data=data or None)

    def prepare(self) -> None:
        """Load off, source off, current limit, scope set-up (every node's channel)."""
        bench, acquisition = self.bench, self.sequence.acquisition
        with self.timings.charge("instrument"):
            bench.load.set_input(False)
            bench.source.set_output(False)
            bench.source.set_current_limit(self.sequence.bench.limits.source_max_current_a)
            for node in self.sequence.nodes:
                bench.scope.configure_channel(
                    node.channel,
                    node.volts_per_div_v,
                    node.offset_v,
                    node.coupling,
                    node.bandwidth_limit_hz,
                    node.probe_ratio,
                )
            bench.scope.configure_timebase(acquisition.time_per_div_s, acquisition.record_length)
            bench.scope.configure_trigger(
                self.sequence.primary.channel,
                acquisition.trigger_level_v,
                acquisition.trigger_slope,
                acquisition.trigger_position,
            )

    def _set_line(self, line_v: float) -> None:
        grid = self.sequence.grid
        with self.timings.charge("instrument"):
            if grid.line_is_ac:
                self.bench.source.set_ac(line_v, grid.line_frequency_hz)
            else:
                self.bench.source.set_dc(line_v)

    def go_to_line(self, line_v: float) -> None:
        """First line value: set it, then output on. Later ones: ramp in declared steps."""
        if self.line_v is None:
            self._set_line(line_v)
            with self.timings.charge("instrument"):
                self.bench.source.set_output(True)
            self.log("info", f"source on at {line_v:g} V")
        else:
            limits = self.sequence.bench.limits
            for step_v in limits.ramp_v(self.line_v, line_v):
                self._set_line(step_v)
                self._wait("ramp", limits.line_step_dwell_s)
        self.line_v = line_v

    def _wait(self, activity: str, seconds: float) -> None:
        with self.timings.charge(activity):
            time.sleep(seconds)

    def acquire(self) -> list[Waveform]:
        """One single-shot acquisition: every node's channel, in the sequence's node order."""
        scope, settings = self.bench.scope, self.sequence.acquisition
        with self.timings.charge("instrument"):
            scope.single()
            scope.wait_acquisition(settings.acquisition_timeout_s, ACQUISITION_POLL_S)
            return [scope.fetch_waveform(node.channel) for node in self.sequence.nodes]

    def clip_warning(self, index: int, number: int, waveforms: list[Waveform]) -> bool:
        """Warn on the console when a capture clipped (once a point): its peak figures are then
        only bounds. True when a warning was given."""
        found = []
        for node, waveform in zip(self.sequence.nodes, waveforms, strict=True):
            edges, screen = waveform.clipped_edges(), waveform.screen_volts()
            if edges and screen is not None:
                at = " and ".join(
                    f"{edge} ({format_si(screen[edge == 'top'], 'V')})" for edge in edges
                )
                found.append(f"{node.name} clipped at the {at} of the screen")
        if found:
            self.progress.message(
                f"point {index}: capture {number}: {'; '.join(found)} - the figures there are "
                "bounds, not measurements; widen the channel's volts_per_div or move its offset",
                error=True,
            )
        return bool(found)

    def read_point(self) -> PointReadings:
        """Meter on the line input, load and source readbacks; efficiency = Pout / Pin."""
        bench = self.bench
        with self.timings.charge("instrument"):
            meter = bench.meter.measure()
            load_v, load_a = bench.load.measure_voltage_v(), bench.load.measure_current_a()
            source_v, source_a = bench.source.measure_voltage_v(), bench.source.measure_current_a()
        output_w = load_v * load_a
        return PointReadings(
            source_voltage_v=source_v,
            source_current_a=source_a,
            load_voltage_v=load_v,
            load_current_a=load_a,
            meter_voltage_v=meter.voltage_v,
            meter_current_a=meter.current_a,
            meter_power_w=meter.power_w,
            meter_power_factor=meter.power_factor,
            output_power_w=output_w,
            efficiency=output_w / meter.power_w if meter.power_w > 0 else None,
        )

    # -- one point ------------------------------------------------------------------------

    def measure_point(self, point: PointRecord, index: int, total: int) -> None:
        """Establish the point, take the captures it still lacks, read the meter, store."""
        seq = self.sequence
        started = time.time()
        self.go_to_line(point.line_v)
        with self.timings.charge("instrument"):
            self.bench.load.set_current(point.load_a)
            self.bench.load.set_input(True)
        self._wait("settle", seq.grid.settle_s)
        already = self.store.acquisitions(point.id)
        wanted = seq.grid.captures_per_point
        clipped = False  # warned of this point's clipping (once a point)
        for number in range(already + 1, wanted + 1):
            self.progress.point(index, total, point.line_v, point.load_a, number, wanted)
            waveforms = self.acquire()
            clipped = clipped or self.clip_warning(index, number, waveforms)
            last = number == wanted
            readings = self.read_point() if last else None
            records = [
                CaptureRecord(waveform, channel=node.channel, node=node.name)
                for node, waveform in zip(seq.nodes, waveforms, strict=True)
            ]
            with self.timings.charge("store"):
                capture_ids = self.store.commit_point(
                    point.id,
                    captures=records,
                    status="done" if last else None,
                    readings=readings,
                    started_at=started if last else None,
                )
            for node, waveform, capture_id in zip(seq.nodes, waveforms, capture_ids, strict=True):
                future = self.analysis.submit(analyse_or_error, seq, waveform, node, point)
                self.pending_figures.append((point.id, capture_id, future))
        if already >= wanted:  # every capture was in; only the readings were missing
            self.store.commit_point(point.id, readings=self.read_point(), started_at=started)
        with self.store.transaction():
            self.finish_figures(wait=False)
            self.log("timing", f"point {index}/{total}: {time.time() - started:.2f} s", point.id)

    def finish_figures(self, *, wait: bool, stop: Callable[[], bool] = lambda: False) -> None:
        """Store the figures of finished analyses (of all, with ``wait``, until ``stop`` says
        so), then judge each done point none of whose captures is still being analysed."""
        still_running = []
        for point_id, capture_id, future in self.pending_figures:
            if not future.done() and (not wait or stop()):
                still_running.append((point_id, capture_id, future))
                continue
            with self.timings.charge("analysis-wait"):
                result = future.result()
            with self.timings.charge("store"):
                store_figures(self.store, capture_id, result)
            self.points_to_judge.add(point_id)
        self.pending_figures = still_running
        busy = {point_id for point_id, _, _ in still_running}
        for point_id in sorted(self.points_to_judge - busy):
            point = self.store.point(point_id)
            if point.status == "done":
                with self.timings.charge("store"):
                    judge_stored_point(self.store, self.sequence, point)
                self.points_to_judge.discard(point_id)

    # -- the whole sweep ------------------------------------------------------------------

    def run(self) -> None:
        """Measure every point not yet done, in grid order, honouring ``on_point_error``."""
        analyse_run(self.store, self.sequence, self.run_id, only_missing=True)
        points = [p for p in self.store.points(self.run_id) if p.status != "done"]
        total = len(self.store.points(self.run_id))
        self.progress.start(total, done=total - len(points))
        if points:
            self.prepare()
        for point in points:
            index = point.point_index + 1
            try:
                self.measure_point(point, index, total)
            except InstrumentError as error:
                self.point_failed(point, error)
            self.progress.advance()

    def point_failed(self, point: PointRecord, error: InstrumentError) -> None:
        """Log the error; abort, or mark the point failed, recover the bench and go on."""
        kind = "scpi-error" if isinstance(error, ScpiError) else "fault"
        data = {"code": error.code} if isinstance(error, ScpiError) else {}
        self.log(kind, f"{point.line_v:g} V / {point.load_a:g} A: {error}", point.id, **data)
        then = "aborting the run" if self.sequence.on_point_error == "abort" else "skipped"
        self.progress.message(f"point {point.point_index + 1}: {error} - {then}", error=True)
        if self.sequence.on_point_error == "abort":
            raise PointAbort(
                f"point {point.point_index + 1} failed (on_point_error = abort): {error}"
            )
        self.store.commit_point(point.id, status="failed")
        self.log("skip", f"point {point.point_index + 1} skipped after the error", point.id)
        self.recover()

    def recover(self) -> None:
        """After a fault: reopen every instrument that does not answer, stop the scope, clear
        error queues. The source keeps its setpoint; the next point re-establishes the load."""
        for role, driver in list(self.bench.drivers.items()):
            try:
                driver.clear()
                driver.identify()
            except InstrumentError as error:
                self.log("retry", f"reconnecting {role}: {error}")
                self.bench.reopen(role)
        try:
            self.bench.scope.write(self.bench.scope.map.command("stop"))
        except InstrumentError as error:
            self.log("retry", f"could not stop the scope: {error}")

    def finish(self, stop: Callable[[], bool]) -> None:
        """After the shutdown: store the figures still being analysed and judge their points,
        until ``stop`` says a signal asked to end; what is left then is analysed by
        ``labseq resume``, from the stored captures."""
        try:
            with self.store.transaction():
                self.finish_figures(wait=True, stop=stop)
        finally:
            self.analysis.shutdown(wait=True, cancel_futures=True)


class BenchNotSafe(LabseqError):
    """The bench could not be confirmed safe before the sweep: nothing is switched on."""


def _log_safety(store: Store, run_id: int, report: SafeReport, when: str) -> None:
    """Record what making the bench safe found, once the outputs are off (a store write could
    block; it never comes before an off command)."""
    with store.transaction():
        for message in report.messages:
            store.log_event(run_id, "safety", message)
        store.log_event(
            run_id,
            "safety",
            f"{when}: {report.summary()}",
            data={"safe": report.safe, "when": when},
        )


def _shutdown(
    bench: Bench,
    store: Store,
    run_id: int,
    progress: Progress,
    latch: SignalLatch,
    *,
    clean: bool,
) -> SafeReport:
    """Make the bench safe and record how it went: the first thing after the sweep, before
    anything that can block. Signals are held meanwhile: latched and acknowledged, never raised.

    After an unclean ending (a signal or an error may have cut a reply in half) each session is
    opened afresh before it is used, so no stale reply can be read as the answer to an off
    command. Nothing is written to the store or the terminal before the off commands; the
    discharge wait is shown with the live bus reading."""
    acknowledged = latch.count

    def acknowledge() -> None:
        nonlocal acknowledged
        if latch.count > acknowledged:
            acknowledged = latch.count
            progress.message(
                f"{latch.last} received: the shutdown goes on to its end (outputs off and read "
                f"back, the bus watched below {SAFE_BUS_V:g} V); labseq exits after it",
                error=True,
            )

    def on_bus_reading(volts: float) -> None:
        acknowledge()
        if volts >= SAFE_BUS_V:
            progress.waiting(
                f"waiting for the bus to fall below {SAFE_BUS_V:g} V: now {volts:.1f} V"
            )

    try:
        report = make_safe(
            bench,
            watch_bus=not bench.simulated,
            fresh_sessions=not clean,
            on_bus_reading=on_bus_reading,
        )
        acknowledge()
        _store_safely(store, lambda: _log_safety(store, run_id, report, "end of run"))
    finally:
        bench.close()
    progress.stop()
    progress.message(report.summary(), error=not report.safe, always=True)
    return report


def _ending(failure: BaseException | None, report: SafeReport | None, signalled: bool) -> str:
    """The run's status from what ended it and what the shutdown confirmed: a bench not
    confirmed safe outweighs everything; a signal, even one that came during the shutdown,
    makes the run interrupted (``labseq resume`` then does what it skipped)."""
    if report is not None and not report.safe:
        return "unsafe-end"
    if signalled or isinstance(failure, Interrupted):
        return "interrupted"
    if isinstance(failure, PointAbort):
        return "aborted"
    return "finished" if failure is None else "failed"


def _start_safe(bench: Bench, store: Store, run_id: int, progress: Progress) -> None:
    """Put the freshly opened bench safe first (a run killed earlier may have left the outputs
    on), then record its instruments; :class:`BenchNotSafe` if the outputs do not read off."""
    report = make_safe(bench, watch_bus=False)
    _log_safety(store, run_id, report, "before the sweep")
    if not report.outputs_off:
        raise BenchNotSafe(
            f"the bench could not be confirmed safe before the sweep ({report.summary()}); "
            "nothing was switched on"
        )
    identities = bench.identities()
    store.set_run_instruments(run_id, identities)
    for role, identity in identities.items():
        progress.message(
            f"{role:>6}: {identity['manufacturer']} {identity['model']} "
            f"(serial {identity['serial']}) at {identity['resource']}"
        )


def execute(
    sequence: Sequence,
    store: Store,
    run_id: int,
    *,
    progress: Progress,
    sim_faults: str = "",
    latch: SignalLatch | None = None,
) -> RunOutcome:
    """Sweep the run's missing points on the sequence's bench and leave the bench safe.

    One :class:`SignalLatch` covers the whole run (``latch``, installed by the caller for a
    command's whole life, or one of its own): a signal during the sweep raises
    :class:`Interrupted` once; from the end of the sweep on, signals are only latched, so the
    shutdown runs to its end. The shutdown comes first after the sweep; analyses still running
    are waited for only after it (and not at all after a signal: ``labseq resume`` does them).

    Raises what made the run fail (after making the bench safe and recording it); a point
    abort, a signal or a shutdown that cannot confirm the bench safe is an outcome, not an
    error.
    """
    if latch is None:
        with SignalLatch() as own:
            return execute(
                sequence, store, run_id, progress=progress, sim_faults=sim_faults, latch=own
            )
    timings = Timings()
    start = time.perf_counter()
    report: SafeReport | None = None
    failure: BaseException | None = None
    bench = sweep = None
    try:
        with timings.charge("instrument"):
            bench = open_bench(sequence, sim_faults=sim_faults)
            _start_safe(bench, store, run_id, progress)
        sweep = Sweep(sequence, store, run_id, bench, progress, timings)
        sweep.run()
        latch.hold()
    except BaseException as caught:  # noqa: BLE001 - every ending is recorded below
        failure = caught
    try:
        latch.hold()
    except Interrupted as late:  # the first signal came as the sweep ended
        failure = failure or late
    unfinished = store.rollback_unfinished()
    if isinstance(failure, Interrupted) and bench is None and not sequence.bench.simulated:
        bench = _reopen_quietly(sequence, store, run_id)
    if bench is not None:
        with timings.charge("instrument"):
            report = _shutdown(bench, store, run_id, progress, latch, clean=failure is None)
    if sweep is not None:
        try:
            sweep.finish(stop=lambda: latch.first is not None)
        except Exception as error:  # noqa: BLE001 - the bench is safe; recorded below
            failure = failure or error
    progress.stop()
    if unfinished:
        _store_safely(
            store,
            lambda: store.log_event(
                run_id, "info", "a store write cut short by the ending was rolled back"
            ),
        )
    status = _ending(failure, report, latch.first is not None)
    recorded = _record_ending(store, run_id, status, failure, latch)
    if latch.first is not None:
        progress.message(f"run interrupted by {latch.first}", error=True)
    if status == "failed" and isinstance(failure, sqlite3.Error):
        raise _store_failed(store, run_id, failure, report, recorded) from failure
    if status == "failed":
        raise failure  # type: ignore[misc]
    if failure is not None and not isinstance(failure, Interrupted):
        progress.message(str(failure), error=True)
    wall_s = time.perf_counter() - start
    timings.add("total", wall_s)
    store.log_event(run_id, "timing", "run timings", data=timings.seconds)
    record = store.run(run_id)
    return RunOutcome(
        run_id,
        status,
        record.points_done,
        record.points_total,
        report,
        timings,
        wall_s,
        signal_name=latch.first,
    )


def _reopen_quietly(sequence: Sequence, store: Store, run_id: int) -> Bench | None:
    """After a signal while the bench was being opened: open it once more (signals are held
    now) so that the shutdown can put it safe; None if it cannot be opened."""
    try:
        return open_bench(sequence)
    except Exception as error:  # noqa: BLE001 - reported; nothing of ours was switched on
        store.log_event(run_id, "safety", f"could not open the bench to make it safe: {error}")
        return None


def _store_safely(store: Store, write: Callable[[], object]) -> bool:
    """Do one store write after the sweep has ended; False, with the write rolled back, when
    the store fails (locked by another process, disk full, damaged). The bench is made safe
    whatever the store does, and each later write is still tried: the run's status above all."""
    try:
        write()
    except sqlite3.Error:
        store.rollback_unfinished()
        return False
    return True


def _record_ending(
    store: Store, run_id: int, status: str, failure: BaseException | None, latch: SignalLatch
) -> bool:
    """Log why the run ended and store its status; False when the status could not be stored
    (the store failed: the run then reads "running" with a process that is gone, which
    ``labseq runs`` shows as interrupted, and ``labseq resume`` takes it up)."""
    events: list[tuple[str, str]] = []
    if latch.first is not None:
        events.append(("safety", f"run interrupted by {latch.first}"))
    if failure is not None and not isinstance(failure, Interrupted):
        kind = "fault" if not isinstance(failure, PointAbort) else "info"
        events.append((kind, f"run {status}: {type(failure).__name__}: {failure}"))
    if latch.count > 1:
        events.append(("safety", f"{latch.count} signals in all; the shutdown ran to its end"))
    # the status first: when the disk is full, the little room left goes to what matters most
    recorded = _store_safely(store, lambda: store.set_run_status(run_id, status))
    for kind, message in events:
        _store_safely(
            store, lambda kind=kind, message=message: store.log_event(run_id, kind, message)
        )
    return recorded


def _store_failed(
    store: Store,
    run_id: int,
    failure: sqlite3.Error,
    report: SafeReport | None,
    recorded: bool,
) -> StoreError:
    """The error that ends a run whose store failed under it, saying what became of the bench
    and of the run."""
    bench = "the bench was not opened" if report is None else f"the bench: {report.summary()}"
    run = (
        f"run {run_id} is marked failed"
        if recorded
        else f"run {run_id}'s status could not be written either (it shows as interrupted)"
    )
    return StoreError(
        f"{store_failure(store.path, failure)}; {bench}; {run}; every capture committed before "
        f"is kept: `labseq resume {run_id}` finishes it once the store can be written"
    )


def start_run(sequence: Sequence, store: Store, *, label: str = "") -> int:
    """Record a new run of ``sequence`` with its grid as pending points; return the run id."""
    run_id = store.create_run(
        sequence_text=sequence.text,
        sequence_sha256=sequence.sha256,
        sequence_path=str(sequence.path),
        dut_label=sequence.dut.label,
        snubber_label=sequence.snubber.label,
        bench_kind=sequence.bench.kind,
        notes=label,
    )
    store.add_points(
        run_id,
        sequence.points(),
        line_is_ac=sequence.grid.line_is_ac,
        line_frequency_hz=sequence.grid.line_frequency_hz,
    )
    return run_id


def bench_locks(sequence: Sequence, store: Store) -> AbstractContextManager[None]:
    """Exclusive use of the store and of every real instrument the sequence names, so a second
    labseq process cannot interleave commands on the bench or write the same store."""
    return run_locks(store.path, lock_names(sequence))


def run_sequence(
    sequence: Sequence,
    store: Store,
    *,
    quiet: bool = True,
    label: str = "",
    sim_faults: str = "",
) -> int:
    """Run ``sequence`` start to finish; return the run id (see :func:`execute` for details)."""
    with bench_locks(sequence, store):
        run_id = start_run(sequence, store, label=label)
        execute(sequence, store, run_id, progress=Progress(quiet=quiet), sim_faults=sim_faults)
    return run_id


#: What ``resume --take-over`` risks, said where the option is offered and where it is used.
TAKE_OVER_RISK = (
    "if that process is in fact still running, two processes will command the same "
    "instruments and write the same run"
)


def check_resumable(store: Store, run_id: int, *, take_over: bool = False) -> RunRecord:
    """The run to resume, in whatever state it ended — even a complete run is resumed: its
    bench is made safe, its missing figures and verdicts filled in. Refused only for a run still
    running in another live process (a run whose process died is marked interrupted first; a
    process is the same one only if its id and its start time match). ``take_over`` accepts a
    run recorded as running all the same, for a process on another host that is known gone."""
    store.mark_abandoned_runs()
    record = store.run(run_id)
    if record.status == "running":
        owner = f"process {record.pid} on {record.host}"
        if not take_over:
            checked = (
                "which is still alive"
                if record.host == socket.gethostname()
                else "another host, which labseq cannot check from here"
            )
            raise RunStateError(
                f"run {run_id} is recorded as running in {owner}, {checked}; stop it first or "
                f"wait for it to finish. If you know it has ended, resume with --take-over "
                f"(risk: {TAKE_OVER_RISK})"
            )
        store.log_event(run_id, "safety", f"run taken over from {owner} (--take-over)")
    return record


def claim_for_resume(store: Store, run_id: int, *, take_over: bool = False) -> RunRecord:
    """:func:`check_resumable`, then make this process the run's owner; returns the run as it
    was before the claim."""
    record = check_resumable(store, run_id, take_over=take_over)
    store.claim_run(run_id)
    return record
