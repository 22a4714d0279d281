"""Bench kinds: what ``[bench] kind`` may say, and how each kind is read and reached.

A kind is registered in :data:`BENCH_KINDS` by the module and object that implement it, the way
python-can lists its bus interfaces: the module is imported only when a sequence names the kind,
so a command that never meets a simulated bench never imports the simulator. The registry also
lists the ``[bench]`` keys each kind alone reads, so a key of another kind is refused by name
without loading that kind.

Every kind shares the generic ``[bench]`` keys (``maps``, ``visa_library``, ``timeout``,
``limits``), read by :mod:`labseq.sequence`. ``"visa"`` is a bench of real instruments named by
``[bench.resources]``; ``"sim"`` is the simulated bench (:mod:`labseq.sim_bench`).
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labseq.errors import InputError

if TYPE_CHECKING:
    from labseq.sequence import BenchSpec, Clamp, Dut, NodeSpec, Sequence

#: Records a problem of the sequence file: (key, message).
Fail = Callable[[str, str], None]


@dataclass(frozen=True)
class Started:
    """The resource string of every role of a bench made ready for a run, and how to stop what
    was started for it (None when nothing was)."""

    resources: dict[str, str]
    stop: Callable[[], None] | None = None


class BenchKind:
    """How one kind of bench is read from a sequence file and made ready for a run.

    A kind reads its own ``[bench]`` keys (:meth:`read`, into the ``settings`` of
    :class:`labseq.sequence.BenchSpec`), checks them against the rest of the file
    (:meth:`check`), and gives the resource of every role when a run starts (:meth:`start`).
    """

    #: The word of ``[bench] kind``.
    name: str = ""
    #: True for a bench with no hardware behind it: no ES1 gate, no bus to watch, no
    #: instrument locks, no resources in the file.
    simulated: bool = False
    #: The VISA library used when the sequence names none ("" lets PyVISA choose).
    default_visa_library: str = ""

    def read(self, table: Any, seq_dir: Path) -> Any:
        """The kind's own settings from the ``[bench]`` table (a sequence reader's table, whose
        problems are recorded with their keys and lines); None when there are none, or when a
        problem was recorded."""
        return None

    def check(
        self,
        settings: Any,
        fail: Fail,
        *,
        dut: Dut | None,
        nodes: list[NodeSpec],
        clamp: Clamp | None,
    ) -> None:
        """Record what in the rest of the file this bench cannot do (``nodes``: the further
        nodes, ``[[nodes]]``)."""

    def start(self, sequence: Sequence, *, faults: str = "", seed: int = 0) -> Started:
        """Make the bench ready for a run: the resource string of every role."""
        raise NotImplementedError

    def describe(self, spec: BenchSpec) -> str:
        """The bench in a few words, for ``labseq check``."""
        raise NotImplementedError


class VisaBench(BenchKind):
    """Real instruments, each reached by the VISA resource string or alias the sequence's
    ``[bench.resources]`` gives for its role."""

    name = "visa"

    def start(self, sequence: Sequence, *, faults: str = "", seed: int = 0) -> Started:
        if faults:
            raise InputError('fault injection needs the simulated bench (bench.kind = "sim")')
        return Started(dict(sequence.bench.resources))

    def describe(self, spec: BenchSpec) -> str:
        return "VISA: " + ", ".join(f"{role}={name}" for role, name in spec.resources.items())


VISA_BENCH = VisaBench()


@dataclass(frozen=True)
class KindEntry:
    """Where a bench kind lives: ``module``'s object ``attribute``, and the ``[bench]`` keys
    that kind alone reads."""

    module: str
    attribute: str
    keys: tuple[str, ...] = ()


#: Every bench kind, by the word of ``[bench] kind``.
BENCH_KINDS: dict[str, KindEntry] = {
    "sim": KindEntry("labseq.sim_bench", "SIM_BENCH", ("dut", "sim_dialect")),
    "visa": KindEntry("labseq.bench_kinds", "VISA_BENCH"),
}


def bench_kind(name: str) -> BenchKind:
    """The bench kind registered as ``name`` (its module imported now, if it was not yet)."""
    entry = BENCH_KINDS[name]
    return getattr(importlib.import_module(entry.module), entry.attribute)


def is_simulated(name: str) -> bool:
    """Whether a run recorded with bench kind ``name`` ran on a bench with no hardware behind
    it (False for a kind this labseq does not know)."""
    return name in BENCH_KINDS and bench_kind(name).simulated


def owner_of(key: str) -> str | None:
    """The kind that alone reads ``[bench]`` key ``key``, or None for a generic key."""
    return next((name for name, entry in BENCH_KINDS.items() if key in entry.keys), None)
