"""The lab database: runs published from every bench's SQLite store into one PostgreSQL database.

A bench keeps writing its runs to its own SQLite file (an unattended sweep never depends on the
network); ``labseq publish`` copies finished runs into the lab's PostgreSQL database, and the read
commands (``runs``, ``report``, ``compare``, ``design --run``, ``export``) read them back from
there with ``--db postgresql://…``. Every SQL statement for PostgreSQL is in this module.

The tables have the SQLite store's shape (runs, points, captures with the raw codes as the store
keeps them — ``bytea``, compressed or not as ``codec`` says —, capture figures, point figures,
node verdicts, events) with the database's own ids; a run is named across databases by its UUID
(``runs.uuid``, unique). ``schema_info`` holds the schema version, checked on every open: a
database written by a newer labseq is refused untouched.

Publishing is idempotent by run UUID and each run goes in ONE transaction — its row, points,
captures (streamed with ``COPY … FROM STDIN`` in binary), figures, verdicts and events — so a
reader never sees part of a run, and a publish cut short (a dropped connection, a killed process)
leaves nothing of the run it was copying: rerunning it publishes what is missing.

Credentials come only from where libpq looks for them: the URL, the ``PG*`` environment
variables and the password file (``~/.pgpass`` or ``PGPASSFILE``). labseq never stores them and
never prints a password: every message names the database by :func:`redact` of its URL.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import numpy as np

from labseq import __version__
from labseq.errors import InputError
from labseq.figures import CAPTURE_METHODS
from labseq.store import (
    APPLICATION,
    PointRecord,
    RunRecord,
    Store,
    StoredCapture,
    StoreError,
    UnknownRunError,
    _edges_of,
    _json_field,
    _point_record_of,
    _record,
    _run_record_of,
    decode_codes,
)

#: Version of the lab database's schema (its own numbering; it holds the rows of a version-4
#: SQLite store). A database with a higher version is refused, one without tables is set up.
SCHEMA_VERSION = 1
#: What a lab database URL starts with (libpq's URI forms).
URL_SCHEMES = ("postgresql://", "postgres://")

#: Each table's columns as "name type constraints", in the order COPY sends them. The first word
#: is the column, the second its type (a bigserial is a bigint to COPY).
_RUNS = (
    "id bigserial PRIMARY KEY",
    "uuid uuid NOT NULL UNIQUE",
    "bench_host text NOT NULL",
    "bench_id text NOT NULL",
    "sequence_text text NOT NULL",
    "sequence_sha256 text NOT NULL",
    "sequence_path text NOT NULL",
    "dut_label text NOT NULL",
    "snubber_label text NOT NULL",
    "bench_kind text NOT NULL",
    "instruments text NOT NULL",
    "software_version text NOT NULL",
    "status text NOT NULL",
    "started_at text NOT NULL",
    "finished_at text",
    "notes text NOT NULL",
    "pid int8",
    "host text",
    "process_started float8",
    "nodes text NOT NULL",
    "with_codes bool NOT NULL",
    "published_at text NOT NULL",
    "published_by text NOT NULL",
)
_POINTS = (
    "id bigserial PRIMARY KEY",
    "run_id int8 NOT NULL REFERENCES runs(id) ON DELETE CASCADE",
    "point_index int4 NOT NULL",
    "line_v float8 NOT NULL",
    "line_is_ac int4 NOT NULL",
    "line_frequency_hz float8 NOT NULL",
    "load_a float8 NOT NULL",
    "status text NOT NULL",
    "source_voltage_v float8",
    "source_current_a float8",
    "load_voltage_v float8",
    "load_current_a float8",
    "meter_voltage_v float8",
    "meter_current_a float8",
    "meter_power_w float8",
    "meter_power_factor float8",
    "output_power_w float8",
    "efficiency float8",
    "verdict text",
    "verdict_reasons text",
    "started_at text",
    "finished_at text",
    "duration_s float8",
)
_CAPTURES = (
    "id bigserial PRIMARY KEY",
    "point_id int8 NOT NULL REFERENCES points(id) ON DELETE CASCADE",
    "run_id int8 NOT NULL REFERENCES runs(id) ON DELETE CASCADE",
    "capture_index int4 NOT NULL",
    "node text NOT NULL",
    "channel int4 NOT NULL",
    "dtype text NOT NULL",
    "x_increment_s float8 NOT NULL",
    "x_origin_s float8 NOT NULL",
    "y_increment_v float8 NOT NULL",
    "y_origin_v float8 NOT NULL",
    "y_reference float8 NOT NULL",
    "code_min float8",
    "code_max float8",
    "points int4 NOT NULL",
    "captured_at text NOT NULL",
    "codec text NOT NULL",
    "codes bytea",  # NULL when published with --no-captures
)
#: A capture's figures: the figure catalogue's REAL and TEXT figures as of schema version 1
#: (a figure added to the catalogue needs a new version that adds its column).
_CAPTURE_FIGURES = (
    "capture_id int8 PRIMARY KEY REFERENCES captures(id) ON DELETE CASCADE",
    "base_v float8",
    "plateau_v float8",
    "peak_v float8",
    "overshoot_v float8",
    "overshoot_pct float8",
    "rise_time_s float8",
    "edge_time_s float8",
    "ring_frequency_hz float8",
    "decay_rate_per_s float8",
    "damping_ratio float8",
    "q_factor float8",
    "fit_quality float8",
    "settling_time_s float8",
    "snubber_loss_w float8",
    "stress_margin_v float8",
    "clamp_level_v float8",
    "clamp_loss_w float8",
    "natural_frequency_hz float8",
    "real_pole_decay_rate_per_s float8",
    "snubber_loss_method text",
    "clamp_loss_method text",
    "ring_model text",
    "clipped int4",
    "edge_count int4",
    "error text",
    "edges_json text",
)
_POINT_FIGURES = (
    "point_id int8 NOT NULL REFERENCES points(id) ON DELETE CASCADE",
    "node text NOT NULL",
    "figure text NOT NULL",
    "worst float8",
    "mean float8",
    "spread float8",
    "n int4 NOT NULL",
)
_NODE_VERDICTS = (
    "point_id int8 NOT NULL REFERENCES points(id) ON DELETE CASCADE",
    "node text NOT NULL",
    "verdict text NOT NULL",
    "verdict_reasons text NOT NULL",
)
_EVENTS = (
    "id bigserial PRIMARY KEY",
    "run_id int8 NOT NULL REFERENCES runs(id) ON DELETE CASCADE",
    "point_id int8 REFERENCES points(id) ON DELETE CASCADE",
    "time text NOT NULL",
    "kind text NOT NULL",
    "message text NOT NULL",
    "data text",
)


def _names(spec: tuple[str, ...]) -> list[str]:
    """The column names of a table spec."""
    return [column.split()[0] for column in spec]


def _copy_types(spec: tuple[str, ...]) -> list[str]:
    """The types COPY's binary format sends for a table spec's columns."""
    return [column.split()[1].replace("bigserial", "int8") for column in spec]


def _names_but_id(spec: tuple[str, ...]) -> list[str]:
    """The column names of a table spec but its own id (which this database numbers)."""
    return [column.split()[0] for column in spec if not column.startswith("id ")]


def _create_table(name: str, spec: tuple[str, ...], extra: tuple[str, ...] = ()) -> str:
    return f"CREATE TABLE {name} ({', '.join(spec + extra)})"


#: The version-1 schema; a new database gets it in one transaction.
_SCHEMA_1 = [
    "CREATE TABLE schema_info (version integer NOT NULL, application text NOT NULL, "
    "created_by text NOT NULL, created_at text NOT NULL)",
    _create_table("runs", _RUNS),
    "CREATE INDEX runs_dut ON runs (dut_label)",
    "CREATE INDEX runs_snubber ON runs (snubber_label)",
    "CREATE INDEX runs_bench ON runs (bench_id)",
    "CREATE INDEX runs_started ON runs (started_at)",
    _create_table("points", _POINTS, ("UNIQUE (run_id, point_index)",)),
    _create_table("captures", _CAPTURES, ("UNIQUE (point_id, node, capture_index)",)),
    # the codes are compressed already (zstd): stored out of line without a second compression
    "ALTER TABLE captures ALTER COLUMN codes SET STORAGE EXTERNAL",
    "CREATE INDEX captures_run ON captures (run_id, node)",
    _create_table("capture_figures", _CAPTURE_FIGURES),
    _create_table("point_figures", _POINT_FIGURES, ("PRIMARY KEY (point_id, node, figure)",)),
    _create_table("node_verdicts", _NODE_VERDICTS, ("PRIMARY KEY (point_id, node)",)),
    _create_table("events", _EVENTS),
    "CREATE INDEX events_run ON events (run_id)",
    "CREATE INDEX events_point ON events (point_id)",
]

_SCHEMA_PRESENT = "SELECT to_regclass('schema_info') IS NOT NULL AS present"
_SCHEMA_ROW = "SELECT version, application FROM schema_info"
_SCHEMA_INSERT = (
    "INSERT INTO schema_info (version, application, created_by, created_at) VALUES (%s, %s, %s, %s)"
)
#: Only one labseq sets up a new database at a time (a transaction-scoped advisory lock).
_SETUP_LOCK = "SELECT pg_advisory_xact_lock(7262, 1)"

_RUNS_QUERY = """
SELECT r.*,
    (SELECT COUNT(*) FROM points p WHERE p.run_id = r.id) AS points_total,
    (SELECT COUNT(*) FROM points p WHERE p.run_id = r.id AND p.status = 'done') AS points_done
FROM runs r"""
_ALL_RUNS = _RUNS_QUERY + " ORDER BY r.started_at, r.id"
_RUN_BY_ID = _RUNS_QUERY + " WHERE r.id = %s"
_RUNS_BY_UUID = _RUNS_QUERY + " WHERE r.uuid::text LIKE %s ORDER BY r.started_at, r.id"
_RUN_IDS = "SELECT id FROM runs ORDER BY id"
_NODES_OF_RUN = "SELECT nodes FROM runs WHERE id = %s"
_PUBLISHED = "SELECT uuid::text AS uuid, with_codes FROM runs WHERE uuid = ANY(%s::uuid[])"
_POINTS_OF_RUN = "SELECT * FROM points WHERE run_id = %s ORDER BY point_index"
_POINTS_WITH_STATUS = "SELECT * FROM points WHERE run_id = %s AND status = %s ORDER BY point_index"
_POINT = "SELECT * FROM points WHERE id = %s"
_NODE_FIGURES = (
    "SELECT f.* FROM point_figures f JOIN points p ON p.id = f.point_id "
    "WHERE p.run_id = %s ORDER BY p.point_index, f.node, f.figure"
)
_NODE_VERDICTS_OF_RUN = (
    "SELECT v.* FROM node_verdicts v JOIN points p ON p.id = v.point_id "
    "WHERE p.run_id = %s ORDER BY p.point_index, v.node"
)
_CAPTURE_ROWS = (
    "SELECT c.id, c.point_id, c.run_id, c.capture_index, c.node, c.channel, c.captured_at, "
    "c.x_increment_s, c.x_origin_s, c.y_increment_v, c.y_origin_v, c.y_reference, c.code_min, "
    "c.code_max, c.dtype, c.points, c.codes IS NOT NULL AS has_codes "
    "FROM captures c JOIN points p ON p.id = c.point_id "
)
_CAPTURES_OF_POINT = _CAPTURE_ROWS + "WHERE c.point_id = %s ORDER BY c.capture_index, c.id"
_CAPTURES_OF_NODE = (
    _CAPTURE_ROWS + "WHERE c.point_id = %s AND c.node = %s ORDER BY c.capture_index, c.id"
)
_CAPTURES_OF_RUN = (
    _CAPTURE_ROWS + "WHERE c.run_id = %s ORDER BY p.point_index, c.capture_index, c.id"
)
_UNANALYSED_OF_RUN = (
    _CAPTURE_ROWS + "LEFT JOIN capture_figures f ON f.capture_id = c.id "
    "WHERE c.run_id = %s AND f.capture_id IS NULL ORDER BY p.point_index, c.capture_index, c.id"
)
_CODES = "SELECT codes, codec FROM captures WHERE id = %s"
_CAPTURE_FIGURES_ROW = "SELECT * FROM capture_figures WHERE capture_id = %s"
_CAPTURE_METHOD_ROWS = (
    "SELECT DISTINCT c.node, c.point_id, "
    "(to_jsonb(f) ->> %s) AS method FROM captures c "
    "JOIN capture_figures f ON f.capture_id = c.id WHERE c.run_id = %s ORDER BY method"
)
_CLIPPED = (
    "SELECT DISTINCT c.node, c.point_id FROM captures c "
    "JOIN capture_figures f ON f.capture_id = c.id WHERE c.run_id = %s AND f.clipped = 1"
)
_EVENTS_OF_RUN = "SELECT * FROM events WHERE run_id = %s ORDER BY id"
_LAST_SAFETY = (
    "SELECT message, (data::jsonb ->> 'when') AS heading FROM events "
    "WHERE run_id = %s AND kind = 'safety' AND (data::jsonb -> 'safe') IS NOT NULL "
    "AND jsonb_typeof(data::jsonb -> 'safe') <> 'null' ORDER BY id DESC LIMIT 1"
)

# publishing
_INSERT_RUN = (
    f"INSERT INTO runs ({', '.join(_names_but_id(_RUNS))}) "
    f"VALUES ({', '.join(['%s'] * (len(_RUNS) - 1))}) ON CONFLICT (uuid) DO NOTHING RETURNING id"
)
_RUN_OF_UUID = "SELECT id, with_codes FROM runs WHERE uuid = %s FOR UPDATE"
_DROP_POINTS = "DELETE FROM points WHERE run_id = %s"
_DROP_EVENTS = "DELETE FROM events WHERE run_id = %s"
_SET_WITH_CODES = "UPDATE runs SET with_codes = true, published_at = %s WHERE id = %s"
_POINT_IDS = "SELECT nextval('points_id_seq') FROM generate_series(1, %s)"
_CAPTURE_IDS = "SELECT nextval('captures_id_seq') FROM generate_series(1, %s)"
_COPY_POINTS = f"COPY points ({', '.join(_names(_POINTS))}) FROM STDIN (FORMAT BINARY)"
_COPY_CAPTURES = f"COPY captures ({', '.join(_names(_CAPTURES))}) FROM STDIN (FORMAT BINARY)"
_COPY_CAPTURE_FIGURES = (
    f"COPY capture_figures ({', '.join(_names(_CAPTURE_FIGURES))}) FROM STDIN (FORMAT BINARY)"
)
_COPY_POINT_FIGURES = (
    f"COPY point_figures ({', '.join(_names(_POINT_FIGURES))}) FROM STDIN (FORMAT BINARY)"
)
_COPY_NODE_VERDICTS = (
    f"COPY node_verdicts ({', '.join(_names(_NODE_VERDICTS))}) FROM STDIN (FORMAT BINARY)"
)
_COPY_EVENTS = f"COPY events ({', '.join(_names_but_id(_EVENTS))}) FROM STDIN (FORMAT BINARY)"


class LabDatabaseError(StoreError):
    """The lab database cannot be reached or used (exit status 3: a store failure)."""

    exit_code = 3


class LabDatabaseInputError(StoreError, InputError):
    """The URL names no usable lab database (not ours, too new, not set up): exit status 2."""

    exit_code = 2


def is_lab_url(text: str) -> bool:
    """Whether ``--db`` (or ``--to``) names a PostgreSQL lab database rather than a file."""
    return str(text).strip().lower().startswith(URL_SCHEMES)


def redact(url: str) -> str:
    """``url`` with any password replaced by ``***`` (in the user part or a ``password=``
    parameter): the only form of a lab database URL labseq ever prints."""
    parts = urlsplit(url)
    netloc = parts.netloc
    if "@" in netloc:
        user, _, host = netloc.rpartition("@")
        if ":" in user:
            user = user.split(":", 1)[0] + ":***"
        netloc = f"{user}@{host}"
    query = "&".join(
        "password=***" if part.split("=", 1)[0].lower() == "password" else part
        for part in parts.query.split("&")
    )
    return urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment))


def _password_of(url: str) -> str | None:
    """The password written in ``url`` (user part or parameter), to scrub from messages."""
    try:
        from psycopg.conninfo import conninfo_to_dict

        return conninfo_to_dict(url).get("password")
    except Exception:  # an unparsable URL: libpq says why when it is used
        return urlsplit(url).password


#: Seconds to wait for a connection when neither the URL nor PGCONNECT_TIMEOUT says (libpq's
#: default is to wait as long as the operating system does, minutes for a host that is down).
CONNECT_TIMEOUT_S = 15


def _connect_defaults(url: str) -> dict[str, Any]:
    """Connection settings labseq adds where the user gave none."""
    from psycopg.conninfo import conninfo_to_dict

    given = "connect_timeout" in conninfo_to_dict(url) or "PGCONNECT_TIMEOUT" in os.environ
    return {} if given else {"connect_timeout": CONNECT_TIMEOUT_S}


def _values(row: dict[str, Any], names: list[str]) -> list[Any]:
    """A source row's values in the order of ``names``; a column the bench's store has and this
    database lacks (a newer labseq wrote the store) stops the publish rather than drop it."""
    unknown = set(row) - set(names) - {"id"}
    if unknown:
        raise LabDatabaseInputError(
            f"the bench's store has columns this lab database lacks ({', '.join(sorted(unknown))})"
            ": upgrade labseq"
        )
    return [row.get(name) for name in names]


def _now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds")


@dataclass(frozen=True)
class Published:
    """What publishing one run did: ``"published"``, ``"already there"`` or ``"captures added"``
    (a run published earlier without its captures), with the counts copied."""

    uuid: str
    outcome: str
    points: int = 0
    captures: int = 0
    code_bytes: int = 0


class LabDatabase:
    """A lab database (PostgreSQL); use as a context manager.

    ``LabDatabase(url)`` connects with libpq's own handling of the URL, ``PG*`` variables and the
    password file, and checks the schema: with ``setup=True`` (publishing) a database without
    labseq's tables gets them; otherwise it must hold them. The read methods are the SQLite
    store's, so every reading command works the same on either.
    """

    def __init__(self, url: str, *, setup: bool = False) -> None:
        try:
            import psycopg
            from psycopg.rows import dict_row
        except ImportError:
            raise InputError(
                "a lab database (postgresql://) needs the PostgreSQL driver: "
                "pip install 'labseq[lab]'"
            ) from None
        self._psycopg = psycopg
        self.url = url
        self._location = redact(url)  # how every message names this database
        self._secret = _password_of(url)
        try:
            self.conn = psycopg.connect(
                url, row_factory=dict_row, autocommit=True, **_connect_defaults(url)
            )
        except psycopg.Error as exc:
            raise LabDatabaseError(f"{self.location}: cannot connect: {self._clean(exc)}") from None
        try:
            self._check_schema(setup)
        except BaseException:
            self.conn.close()
            raise

    # ------------------------------------------------------------------- opening

    def _clean(self, exc: BaseException) -> str:
        """An error's text with any password in it replaced (libpq does not echo it, but a
        message must not depend on that)."""
        text = " ".join(str(exc).split())
        if self._secret:
            text = text.replace(self._secret, "***")
        return text

    def _fail(self, exc: Exception, doing: str) -> LabDatabaseError:
        return LabDatabaseError(f"{self.location}: {doing}: {self._clean(exc)}")

    def _check_schema(self, setup: bool) -> None:
        try:
            with self.conn.transaction():
                if setup:
                    self.conn.execute(_SETUP_LOCK)
                present = self.conn.execute(_SCHEMA_PRESENT).fetchone()["present"]
                if not present:
                    if not setup:
                        raise LabDatabaseInputError(
                            f"{self.location}: not a labseq lab database (no schema_info table); "
                            "`labseq publish RUN --to URL` sets one up"
                        )
                    for statement in _SCHEMA_1:
                        self.conn.execute(statement)
                    self.conn.execute(
                        _SCHEMA_INSERT, [SCHEMA_VERSION, APPLICATION, __version__, _now_iso()]
                    )
                    return
                row = self.conn.execute(_SCHEMA_ROW).fetchone()
        except self._psycopg.Error as exc:
            doing = "cannot read or set up its schema" if setup else "cannot read its schema"
            raise self._fail(exc, doing) from None
        if row is None or row["application"] != APPLICATION:
            raise LabDatabaseInputError(
                f"{self.location}: its schema_info is not labseq's; give another database"
            )
        if row["version"] > SCHEMA_VERSION:
            raise LabDatabaseInputError(
                f"{self.location}: written by a newer labseq (lab schema version {row['version']}; "
                f"this labseq {__version__} reads version {SCHEMA_VERSION}); upgrade labseq to "
                "use it. Nothing was changed."
            )

    @property
    def location(self) -> str:
        """The database's URL without its password."""
        return self._location

    def __enter__(self) -> LabDatabase:
        return self

    def __exit__(self, kind: object, error: BaseException | None, trace: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection."""
        self.conn.close()

    def _fetch(self, query: str, params: list[Any]) -> list[dict[str, Any]]:
        try:
            return self.conn.execute(query, params).fetchall()
        except self._psycopg.Error as exc:
            raise self._fail(exc, "cannot read") from None

    # ------------------------------------------------------------------- runs

    def runs(self) -> list[RunRecord]:
        """All runs, oldest first (by start time: ids here count publications, not starts),
        with their point counts."""
        return [self._run_record(row) for row in self._fetch(_ALL_RUNS, [])]

    def run(self, run_id: int) -> RunRecord:
        rows = self._fetch(_RUN_BY_ID, [run_id])
        if not rows:
            ids = [str(row["id"]) for row in self._fetch(_RUN_IDS, [])]
            known = f"runs here: {', '.join(ids[-20:])}" if ids else "it holds no runs"
            raise UnknownRunError(f"{self.location}: no run {run_id}; {known}")
        return self._run_record(rows[0])

    def runs_by_uuid(self, prefix: str) -> list[RunRecord]:
        """The runs whose UUID starts with ``prefix`` (lower-case hex digits and dashes)."""
        if not prefix or prefix.strip("0123456789abcdef-"):
            raise ValueError(f"UUID prefix {prefix!r}: lower-case hex digits and dashes only")
        return [self._run_record(row) for row in self._fetch(_RUNS_BY_UUID, [prefix + "%"])]

    def published(self, uuids: list[str]) -> dict[str, bool]:
        """Which of these run UUIDs are here: UUID → whether with their captures' codes."""
        rows = self._fetch(_PUBLISHED, [uuids])
        return {row["uuid"]: row["with_codes"] for row in rows}

    def _run_record(self, row: dict[str, Any]) -> RunRecord:
        return _run_record_of(row, self.location, uuid=str(row["uuid"]))

    def last_safety_check(self, run_id: int) -> str | None:
        rows = self._fetch(_LAST_SAFETY, [run_id])
        return next((row["message"].removeprefix(f"{row['heading']}: ") for row in rows), None)

    # ------------------------------------------------------------------- points

    def points(self, run_id: int, *, status: str | None = None) -> list[PointRecord]:
        self.run(run_id)
        if status is None:
            rows = self._fetch(_POINTS_OF_RUN, [run_id])
        else:
            rows = self._fetch(_POINTS_WITH_STATUS, [run_id, status])
        return [_point_record_of(row, self.location) for row in rows]

    def point(self, point_id: int) -> PointRecord:
        rows = self._fetch(_POINT, [point_id])
        if not rows:
            raise StoreError(f"{self.location}: no point with id {point_id}")
        return _point_record_of(rows[0], self.location)

    def node_figures(self, run_id: int) -> dict[int, dict[str, dict[str, dict[str, Any]]]]:
        result: dict[int, dict[str, dict[str, dict[str, Any]]]] = {}
        for row in self._fetch(_NODE_FIGURES, [run_id]):
            values = {key: row[key] for key in ("worst", "mean", "spread", "n")}
            nodes = result.setdefault(row["point_id"], {})
            nodes.setdefault(row["node"], {})[row["figure"]] = values
        return result

    def point_figures(self, run_id: int, *, node: str) -> dict[int, dict[str, dict[str, Any]]]:
        return {
            point_id: nodes[node]
            for point_id, nodes in self.node_figures(run_id).items()
            if node in nodes
        }

    def node_verdicts(self, run_id: int) -> dict[int, dict[str, tuple[str, list[str]]]]:
        result: dict[int, dict[str, tuple[str, list[str]]]] = {}
        for row in self._fetch(_NODE_VERDICTS_OF_RUN, [run_id]):
            where = f"point {row['point_id']}'s {row['node']} verdict reasons"
            reasons = _json_field(row["verdict_reasons"], where, self.location)
            result.setdefault(row["point_id"], {})[row["node"]] = (row["verdict"], reasons)
        return result

    def node_names(self, run_id: int) -> list[str]:
        """The nodes the run captured, the primary first (as its bench's store listed them)."""
        rows = self._fetch(_NODES_OF_RUN, [run_id])
        return list(json.loads(rows[0]["nodes"])) if rows else []

    # ------------------------------------------------------------------- captures

    def captures(
        self, point_id: int, *, with_codes: bool = True, node: str | None = None
    ) -> list[StoredCapture]:
        """A point's captures in order; with ``with_codes``, only those whose codes are here (a
        run published with ``--no-captures`` has none: the report then says so)."""
        if node is None:
            rows = self._fetch(_CAPTURES_OF_POINT, [point_id])
        else:
            rows = self._fetch(_CAPTURES_OF_NODE, [point_id, node])
        return [
            self._capture(row, with_codes) for row in rows if row["has_codes"] or not with_codes
        ]

    def iter_captures(
        self, run_id: int, *, with_codes: bool = True, only_unanalysed: bool = False
    ) -> Iterator[StoredCapture]:
        """A run's captures in point and capture order; with ``with_codes``, a run published
        without its codes is an error (an export must not leave them out unsaid)."""
        self.run(run_id)
        query = _UNANALYSED_OF_RUN if only_unanalysed else _CAPTURES_OF_RUN
        for row in self._fetch(query, [run_id]):
            yield self._capture(row, with_codes)

    def _capture(self, row: dict[str, Any], with_codes: bool) -> StoredCapture:
        dtype = np.dtype(row["dtype"]).newbyteorder("<")
        codes = np.empty(0, dtype)
        if with_codes:
            stored = self._fetch(_CODES, [row["id"]])[0]
            if stored["codes"] is None:
                raise LabDatabaseInputError(
                    f"{self.location}: run {row['run_id']} was published without its raw captures "
                    "(--no-captures): read them from its bench's store, or publish it again "
                    "with them"
                )
            try:
                codes = decode_codes(bytes(stored["codes"]), stored["codec"], dtype, row["points"])
            except ValueError as exc:
                raise StoreError(
                    f"{self.location}: capture {row['id']} is damaged: {exc}"
                ) from None
        return _record(StoredCapture, row, codes=codes)

    def capture_figures(self, capture_id: int) -> dict[str, Any] | None:
        rows = self._fetch(_CAPTURE_FIGURES_ROW, [capture_id])
        if not rows:
            return None
        result = dict(rows[0])
        result["edges"] = _edges_of(capture_id, result.pop("edges_json"), self.location)
        return result

    def clipped_points(self, run_id: int) -> set[tuple[str, int]]:
        """The (node, point id)s of a run where at least one capture clipped."""
        return {(row["node"], row["point_id"]) for row in self._fetch(_CLIPPED, [run_id])}

    def capture_methods(self, run_id: int, name: str) -> dict[tuple[str, int], tuple[str, ...]]:
        if name not in CAPTURE_METHODS:
            raise ValueError(f"unknown capture method {name!r}; known: {CAPTURE_METHODS}")
        methods: dict[tuple[str, int], tuple[str, ...]] = {}
        for row in self._fetch(_CAPTURE_METHOD_ROWS, [name, run_id]):
            if row["method"] is not None:
                key = (row["node"], row["point_id"])
                methods[key] = (*methods.get(key, ()), row["method"])
        return methods

    # ------------------------------------------------------------------- events

    def events(self, run_id: int) -> list[dict[str, Any]]:
        return [
            {**row, "data": _json_field(row["data"], f"event {row['id']}'s data", self.location)}
            for row in self._fetch(_EVENTS_OF_RUN, [run_id])
        ]

    # ------------------------------------------------------------------- publishing

    def publish_run(self, source: Store, run_id: int, *, with_codes: bool = True) -> Published:
        """Copy run ``run_id`` of ``source`` here in one transaction, unless it is here already
        (by UUID). A run here without its codes gets them when ``with_codes``: its points and
        events are replaced, in the same single transaction."""
        run = source.run(run_id)
        try:
            with self.conn.transaction():
                return self._publish(source, run, with_codes)
        except self._psycopg.Error as exc:
            raise self._fail(
                exc,
                f"publishing run {run.uuid} was cut short (nothing of it "
                "is visible; publish again to copy it)",
            ) from None

    def _publish(self, source: Store, run: RunRecord, with_codes: bool) -> Published:
        cur = self.conn.cursor()
        existing = cur.execute(_RUN_OF_UUID, [run.uuid]).fetchone()
        outcome = "published"
        if existing is not None:
            if existing["with_codes"] or not with_codes:
                return Published(run.uuid, "already there")
            # published before without its codes: replace its rows, keep its id
            target_id = existing["id"]
            cur.execute(_DROP_POINTS, [target_id])
            cur.execute(_DROP_EVENTS, [target_id])
            cur.execute(_SET_WITH_CODES, [_now_iso(), target_id])
            outcome = "captures added"
        else:
            row = source.run_row(run.id)
            row.update(
                nodes=json.dumps(source.node_names(run.id)),
                with_codes=with_codes,
                published_at=_now_iso(),
                published_by=__version__,
            )
            inserted = cur.execute(_INSERT_RUN, _values(row, _names_but_id(_RUNS)))
            found = inserted.fetchone()
            if found is None:  # another publisher committed it meanwhile
                return Published(run.uuid, "already there")
            target_id = found["id"]
        points, captures, code_bytes = self._copy_children(
            cur, source, run.id, target_id, with_codes
        )
        return Published(run.uuid, outcome, points, captures, code_bytes)

    def _copy_children(
        self, cur: Any, source: Store, source_run: int, target_run: int, with_codes: bool
    ) -> tuple[int, int, int]:
        """Copy a run's points, captures, figures, verdicts and events; return (points,
        captures, bytes of codes) copied. Ids are drawn from this database's sequences first,
        so every row goes in by COPY with its parent's new id."""
        points = source.run_table_rows(source_run, "points")
        point_ids = self._new_ids(cur, _POINT_IDS, [row["id"] for row in points])
        self._copy(
            cur,
            _COPY_POINTS,
            _POINTS,
            ({**row, "id": point_ids[row["id"]], "run_id": target_run} for row in points),
        )
        capture_rows = source.run_table_rows(source_run, "captures")
        capture_ids = self._new_ids(cur, _CAPTURE_IDS, [row["id"] for row in capture_rows])
        code_bytes = 0
        with cur.copy(_COPY_CAPTURES) as copy:
            copy.set_types(_copy_types(_CAPTURES))
            names = _names(_CAPTURES)
            for row in (
                source.run_capture_codes(capture_rows)
                if with_codes
                else ({**r, "codes": None} for r in capture_rows)
            ):
                code_bytes += len(row["codes"] or b"")
                row = {
                    **row,
                    "id": capture_ids[row["id"]],
                    "point_id": point_ids[row["point_id"]],
                    "run_id": target_run,
                }
                copy.write_row(_values(row, names))
        self._copy(
            cur,
            _COPY_CAPTURE_FIGURES,
            _CAPTURE_FIGURES,
            (
                {**row, "capture_id": capture_ids[row["capture_id"]]}
                for row in source.run_table_rows(source_run, "capture_figures")
            ),
        )
        for query, spec, table in (
            (_COPY_POINT_FIGURES, _POINT_FIGURES, "point_figures"),
            (_COPY_NODE_VERDICTS, _NODE_VERDICTS, "node_verdicts"),
        ):
            self._copy(
                cur,
                query,
                spec,
                (
                    {**row, "point_id": point_ids[row["point_id"]]}
                    for row in source.run_table_rows(source_run, table)
                ),
            )
        self._copy(
            cur,
            _COPY_EVENTS,
            _EVENTS[1:],
            (
                {
                    **row,
                    "run_id": target_run,
                    "point_id": None if row["point_id"] is None else point_ids[row["point_id"]],
                }
                for row in source.run_table_rows(source_run, "events")
            ),
        )
        return len(points), len(capture_rows), code_bytes

    @staticmethod
    def _new_ids(cur: Any, query: str, source_ids: list[int]) -> dict[int, int]:
        """This database's ids for rows known by ``source_ids``, drawn from its sequence."""
        if not source_ids:
            return {}
        new = [row["nextval"] for row in cur.execute(query, [len(source_ids)]).fetchall()]
        return dict(zip(source_ids, new, strict=True))

    @staticmethod
    def _copy(cur: Any, statement: str, spec: tuple[str, ...], rows: Any) -> None:
        names = _names(spec)
        with cur.copy(statement) as copy:
            copy.set_types(_copy_types(spec))
            for row in rows:
                copy.write_row(_values(row, names))
