"""The simulated bench: four SCPI servers on loopback sharing one flyback model.

Typical use::

    with SimBench(load_dut(DEMO_DUTS["telecom_dc"]), faults="scope:no-trigger@point=3") as bench:
        scope_resource = bench.resources["scope"]  # "TCPIP::127.0.0.1::<port>::SOCKET"
"""

from __future__ import annotations

from collections.abc import Iterable
from types import TracebackType

import numpy as np

from labseq_sim_instruments.faults import ROLES, FaultPlan, FaultSpec, FiredFault, parse_fault_specs
from labseq_sim_instruments.flyback import FlybackDesign, FlybackModel
from labseq_sim_instruments.instruments import (
    DIALECTS,
    GENERIC,
    BenchState,
    SimLoad,
    SimMeter,
    SimScope,
    SimSource,
    SimulatedRole,
)
from labseq_sim_instruments.server import ScpiServer, check_host

INSTRUMENT_CLASSES: dict[str, type[SimulatedRole]] = {
    "source": SimSource,
    "load": SimLoad,
    "meter": SimMeter,
    "scope": SimScope,
}


class SimBench:
    """Source, load, meter and scope as SCPI servers, one TCP port each, one shared model.

    ``faults`` is a fault spec string (see :mod:`labseq_sim_instruments.faults`) or a list of specs;
    ``dialect`` is the command set every instrument speaks (:data:`DIALECTS`: ``generic`` or
    ``alt``); ``seed`` fixes every random draw (reading noise, trigger jitter, line phase), so a
    test sees the same bench each time; ``ports`` maps roles to fixed ports (default: free ports).
    Only loopback addresses are served unless ``allow_remote`` is given.
    """

    def __init__(
        self,
        design: FlybackDesign,
        *,
        faults: str | Iterable[str | FaultSpec] = (),
        host: str = "127.0.0.1",
        allow_remote: bool = False,
        seed: int = 0,
        ports: dict[str, int] | None = None,
        dialect: str = GENERIC,
    ) -> None:
        check_host(host, allow_remote)
        unknown = sorted(set(ports or {}) - set(ROLES))
        if unknown:
            raise ValueError(f"ports: unknown role(s) {unknown}; valid: {', '.join(ROLES)}")
        if dialect not in DIALECTS:
            raise ValueError(f"unknown dialect {dialect!r}; valid: {', '.join(DIALECTS)}")
        specs = _fault_specs(faults)
        self.dialect = dialect
        self.design = design
        self.host = host
        self.state = BenchState(FlybackModel(design))
        self.fault_plan = FaultPlan(
            specs,
            point_count=lambda: self.state.load_setpoints,
            off_count=lambda: _source_offs(self.state.line_history),
        )
        rngs = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(len(ROLES))]
        self.instruments: dict[str, SimulatedRole] = {
            role: INSTRUMENT_CLASSES[role](
                self.state, rng, serial=f"SIM{seed:04d}-{index}", dialect=dialect
            )
            for index, (role, rng) in enumerate(zip(ROLES, rngs, strict=True))
        }
        self.servers: dict[str, ScpiServer] = {
            role: ScpiServer(
                instrument,
                host=host,
                port=(ports or {}).get(role, 0),
                allow_remote=allow_remote,
                interceptor=self.fault_plan.interceptor(role),
            )
            for role, instrument in self.instruments.items()
        }
        self._started: list[ScpiServer] = []

    @property
    def resources(self) -> dict[str, str]:
        """Role → VISA resource string of its server."""
        return {role: server.resource for role, server in self.servers.items()}

    @property
    def fired_faults(self) -> list[FiredFault]:
        """Faults that have fired so far, in order."""
        return list(self.fault_plan.fired)

    def start(self) -> SimBench:
        """Start the four servers; if one cannot start, stop the others and re-raise."""
        try:
            for server in self.servers.values():
                self._started.append(server.start())
        except Exception:
            self.stop()
            raise
        return self

    def stop(self) -> None:
        """Abandon any pending acquisition, switch the outputs off, and close every server."""
        scope = self.instruments["scope"]
        assert isinstance(scope, SimScope)
        scope.stop_acquisition()
        self.state.set_source_output(False)
        with self.state.lock:
            self.state.load_input_on = False
        while self._started:
            self._started.pop().stop()

    def __enter__(self) -> SimBench:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.stop()


def _fault_specs(faults: str | Iterable[str | FaultSpec]) -> list[FaultSpec]:
    if isinstance(faults, str):
        return parse_fault_specs(faults)
    specs: list[FaultSpec] = []
    for item in faults:
        specs.extend([item] if isinstance(item, FaultSpec) else parse_fault_specs(item))
    return specs


def _source_offs(history: list[tuple[float, bool]]) -> int:
    """How many times the source's output went from on to off in its history."""
    states = [on for _, on in list(history)]
    return sum(1 for before, after in zip(states, states[1:], strict=False) if before and not after)
