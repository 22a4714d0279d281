"""Publish throughput: ``LabDatabase.publish_run`` of one run against a plain ``COPY`` of the
same bytes into a bare table, on the test PostgreSQL server (tests/pgserver.py, fsync off for
both sides alike).

The run is bench_storage's synthetic run (16 points × 3 captures, four edges of figures per
capture, a verdict and two events per point) at 20 k and 100 k 8-bit samples per capture, its
codes compressed as the store keeps them. The publish reads the run from the bench's SQLite
file and writes its row, points, captures (binary COPY), figures, verdicts and events in one
transaction; the yardstick sends the captures' stored bytes, already in memory, with one binary
``COPY`` into ``bare (id bigint, codes bytea)`` in one transaction. Each repeat times both, back
to back in alternating order (tests/benchmarks/paired.py), and clears both tables untimed.

Printed: captures/s and MB/s of codes for each, and the median ratio publish / COPY. What the
publish adds to the bare COPY is the SQLite reads, the id mapping and the rows besides the codes
(their indexes and foreign-key checks on the server); on this machine it measured about 3× the
bare COPY at 100 k samples and 4× at 20 k, where the codes are a smaller part of the run. Only a
generous bound is asserted, and only at 100 k samples (below 10×): at 20 k the publish's fixed
cost per run (about 25 ms here) against a 5 ms COPY moves the ratio between 2× and 8× with the
machine's load, so it is printed, not asserted.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from bench_storage import realistic_waveforms, store_realistic_run
from paired import PairedRatios, time_s

from labseq.store import Store
from labseq.store_pg import LabDatabase

psycopg = pytest.importorskip(
    "psycopg", reason="psycopg is not installed: pip install 'labseq[lab]'"
)

REPEATS = 7
MAX_RATIO = 10.0


def _stored_codes(path: Path) -> list[bytes]:
    with sqlite3.connect(path) as conn:
        return [row[0] for row in conn.execute("SELECT codes FROM captures ORDER BY id")]


@pytest.mark.benchmark
@pytest.mark.parametrize("samples", [20_000, 100_000])
def test_publish_against_plain_copy(samples: int, lab_db: str, tmp_path: Path) -> None:
    source_path = tmp_path / "bench.sqlite"
    store_realistic_run(source_path, realistic_waveforms(samples))
    blobs = _stored_codes(source_path)
    megabytes = sum(len(blob) for blob in blobs) / 1e6
    with Store(source_path, create=False) as source, LabDatabase(lab_db, setup=True) as lab:
        (run,) = source.runs()
        lab.conn.execute("CREATE TABLE bare (id bigint, codes bytea)")
        lab.conn.execute("ALTER TABLE bare ALTER COLUMN codes SET STORAGE EXTERNAL")

        def publish() -> None:
            result = lab.publish_run(source, run.id)
            assert result.outcome == "published" and result.captures == len(blobs)

        def plain_copy() -> None:
            with (
                lab.conn.transaction(),
                lab.conn.cursor() as cur,
                cur.copy("COPY bare (id, codes) FROM STDIN (FORMAT BINARY)") as copy,
            ):
                copy.set_types(["int8", "bytea"])
                for index, blob in enumerate(blobs):
                    copy.write_row([index, blob])

        def clear() -> None:
            lab.conn.execute("DELETE FROM runs")
            lab.conn.execute("TRUNCATE bare")

        candidate, yardstick = [], []
        for repeat in range(REPEATS + 1):
            order = [(publish, candidate), (plain_copy, yardstick)]
            for action, times in order if repeat % 2 else reversed(order):
                elapsed = time_s(action)
                if repeat:  # the first round warms the caches
                    times.append(elapsed)
            clear()
    ratios = PairedRatios(tuple(candidate), tuple(yardstick))
    publish_s, copy_s = sorted(candidate)[REPEATS // 2], sorted(yardstick)[REPEATS // 2]
    print(
        f"\npublish, {len(blobs)} captures of {samples // 1000} k samples "
        f"({megabytes:.2f} MB of compressed codes): "
        f"{len(blobs) / publish_s:.0f} captures/s, {megabytes / publish_s:.1f} MB/s; "
        f"plain COPY of the same bytes: {len(blobs) / copy_s:.0f} captures/s, "
        f"{megabytes / copy_s:.1f} MB/s; publish / COPY {ratios.summary()}"
    )
    if samples >= 100_000:
        assert ratios.median < MAX_RATIO
