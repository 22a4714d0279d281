"""Security: what a user (or a file) can make labseq do beyond what it is for.

* The simulated bench listens on loopback only unless remote access is asked for explicitly.
* No SQL is built from user values: user text goes through a run and back verbatim, and a static
  check finds every SQL call in labseq/ that interpolates text and traces each interpolated value
  back to code-defined names.
* No user string reaches an instrument with a command separator or terminator (IEEE 488.2 7.4.1
  and 7.5: ``;`` separates program message units, a newline ends the message).
* User text in the HTML report is escaped (the run-level case here, end to end; the report
  builder's own case is tests/test_report.py::test_user_text_is_escaped).

The guard against two labseq processes driving the same bench or writing the same store is
tested in tests/test_locks.py.
"""

from __future__ import annotations

import ast
import json
import re
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from sweeps import ROOT, demo_sequence

from labseq.cli import main
from labseq.runner import run_sequence
from labseq.sequence import SequenceError, load_sequence
from labseq.store import Store
from labseq_instruments.errors import LimitError, UnsafeTextError
from labseq_instruments.roles import Oscilloscope
from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.server import ServerConfigError

#: User text that is both SQL and HTML an attacker (or an accident) might write.
HOSTILE = "x'); DROP TABLE runs; -- <script>alert(1)</script>"


def cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str]:
    """Run ``labseq ARGS`` in this process; (exit status, stderr)."""
    capsys.readouterr()
    try:
        main(list(args))
        code = 0
    except SystemExit as exit_info:
        code = int(exit_info.code or 0)
    return code, capsys.readouterr().err


# -- the simulated bench binds loopback only -----------------------------------------------


def test_sim_bench_listens_on_loopback_only(telecom_design, make_sim_bench) -> None:
    bench = make_sim_bench()
    for server in bench.servers.values():
        assert server._listener is not None
        assert server._listener.getsockname()[0] == "127.0.0.1"
    with pytest.raises(ServerConfigError, match="not a loopback address"):
        SimBench(telecom_design, host="0.0.0.0")
    allowed = SimBench(telecom_design, host="0.0.0.0", allow_remote=True)  # built, not started
    assert allowed.host == "0.0.0.0"


def test_sim_command_refuses_a_remote_host_unless_allowed(capsys) -> None:
    code, err = cli(capsys, "sim", "--host", "0.0.0.0")
    assert code == 2 and "--allow-remote" in err
    # Allowed, it goes on to bind: 192.0.2.1 (TEST-NET-1, RFC 5737) is no address of this
    # machine, so the bind fails, with a message and nothing served.
    code, err = cli(capsys, "sim", "--host", "192.0.2.1", "--allow-remote")
    assert code == 2 and "cannot listen on 192.0.2.1" in err


# -- hostile user text through a run -------------------------------------------------------


def _hostile_sequence(tmp_path: Path) -> Path:
    path = demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=1, settle="0 s")
    text = path.read_text(encoding="utf-8")
    quoted = json.dumps(HOSTILE)  # a TOML basic string
    text = re.sub(r"^name = .*$", f"name = {quoted}", text, count=1, flags=re.MULTILINE)
    text = re.sub(r"^description = .*$", f"description = {quoted}", text, count=1, flags=re.M)
    text = text.replace('label = "RC 100 ohm / 220 pF (stock)"', f"label = {quoted}")
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Path, int]]:
    """A one-point run whose name, description, snubber label and notes are HOSTILE."""
    tmp_path = tmp_path_factory.mktemp("hostile")
    sequence = load_sequence(_hostile_sequence(tmp_path))
    assert sequence.name == HOSTILE
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_id = run_sequence(sequence, store, label=HOSTILE)
    yield db, run_id


def test_sql_looking_user_text_is_stored_and_read_back_verbatim(hostile_run) -> None:
    db, run_id = hostile_run
    with Store(db, create=False) as store:
        run = store.run(run_id)
        assert run.notes == HOSTILE
        assert run.snubber_label == HOSTILE
        assert f"name = {json.dumps(HOSTILE)}" in run.sequence_text
        assert run.status == "finished" and run.points_done == 1
        tables = {row[0] for row in store.db.execute("SELECT name FROM sqlite_master")}
        assert {"runs", "points", "captures", "events"} <= tables
        assert store.integrity_check() == "ok"


def test_run_report_escapes_user_text(hostile_run, tmp_path: Path, capsys) -> None:
    db, run_id = hostile_run
    out = tmp_path / "report"
    code, err = cli(capsys, "report", str(run_id), "--db", str(db), "--out", str(out))
    assert code == 0, err
    page = (out / "report.html").read_text(encoding="utf-8")
    assert re.search(r"<script", page, re.IGNORECASE) is None
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page


# -- static check: SQL text in labseq/ is built from code-defined names only ---------------

SQL_METHODS = {"execute", "executemany", "executescript", "query", "rows_where"}


class SqlTextChecker:
    """Trace what SQL calls in one module interpolate into their statement text.

    Safe leaves: string and number literals, module-level constants, names produced by
    ``dataclasses.fields(...)``, keys of dicts written in code, and parameters of functions whose
    every call in the checked sources passes safe values. Anything else is reported.
    """

    def __init__(self, sources: dict[str, str]) -> None:
        self.trees = {name: ast.parse(text) for name, text in sources.items()}
        self.visiting: set[tuple[int, str]] = set()  # (scope, name) being traced: cycles
        self.functions: dict[str, list[ast.FunctionDef]] = {}
        self.parents: dict[ast.AST, ast.AST] = {}
        for tree in self.trees.values():
            for node in ast.walk(tree):
                for child in ast.iter_child_nodes(node):
                    self.parents[child] = node
                if isinstance(node, ast.FunctionDef):
                    self.functions.setdefault(node.name, []).append(node)

    def problems(self) -> list[str]:
        found = []
        for name, tree in self.trees.items():
            for node in ast.walk(tree):
                if (
                    isinstance(node, ast.Call)
                    and isinstance(node.func, ast.Attribute)
                    and node.func.attr in SQL_METHODS
                    and node.args
                ):
                    for leaf in self.unsafe(node.args[0], node, depth=0):
                        found.append(f"{name}:{node.lineno}: {leaf}")
        return sorted(set(found))

    def interpolated(self) -> int:
        """How many SQL calls interpolate something (so the check is known to look at them)."""
        return sum(
            1
            for tree in self.trees.values()
            for node in ast.walk(tree)
            if isinstance(node, ast.Call)
            and isinstance(node.func, ast.Attribute)
            and node.func.attr in SQL_METHODS
            and node.args
            and not isinstance(node.args[0], ast.Constant)
        )

    def _function(self, node: ast.AST) -> ast.FunctionDef | None:
        while node in self.parents:
            node = self.parents[node]
            if isinstance(node, ast.FunctionDef):
                return node
        return None

    def _module(self, node: ast.AST) -> ast.Module:
        while node in self.parents:
            node = self.parents[node]
        assert isinstance(node, ast.Module)
        return node

    def unsafe(self, node: ast.AST, where: ast.AST, depth: int, keys: bool = False) -> list[str]:
        """Descriptions of the unsafe leaves of ``node`` (an expression used at ``where``)."""
        if depth > 30:
            return [f"too deep to trace: {ast.unparse(node)}"]
        recurse = lambda n, k=False: self.unsafe(n, where, depth + 1, k)  # noqa: E731
        if isinstance(node, ast.Constant):
            return []
        if isinstance(node, ast.JoinedStr):
            return [
                p
                for v in node.values
                if isinstance(v, ast.FormattedValue)
                for p in recurse(v.value)
            ]
        if isinstance(node, ast.BinOp):
            return recurse(node.left) + recurse(node.right)
        if isinstance(node, ast.Tuple | ast.List | ast.Set):
            return [p for element in node.elts for p in recurse(element)]
        if isinstance(node, ast.IfExp):
            return recurse(node.body, keys) + recurse(node.orelse, keys)
        if isinstance(node, ast.Dict):
            return (
                [p for k in node.keys if k is not None for p in recurse(k)]
                if keys
                else ["a dict's values in SQL text"]
            )
        if isinstance(node, ast.DictComp | ast.ListComp | ast.GeneratorExp):
            element = node.key if isinstance(node, ast.DictComp) else node.elt
            return [p for g in node.generators for p in recurse(g.iter, True)] + self._with_targets(
                element, node.generators, where, depth
            )
        if isinstance(node, ast.Call):
            func = node.func
            if isinstance(func, ast.Name) and func.id in ("fields", "int", "float", "len"):
                return []
            if isinstance(func, ast.Attribute) and func.attr in (
                "join",
                "format",
                "split",
                "strip",
                "removesuffix",
            ):
                return recurse(func.value) + [p for a in node.args for p in recurse(a, keys)]
            if isinstance(func, ast.Name) and func.id in self.functions:
                # a helper of the checked code: what it returns, its parameters traced to the
                # values its callers pass
                return [
                    p
                    for helper in self.functions[func.id]
                    for r in ast.walk(helper)
                    if isinstance(r, ast.Return) and r.value is not None
                    for p in self.unsafe(r.value, r, depth + 1)
                ]
            return [f"call {ast.unparse(node)}"]
        if isinstance(node, ast.Attribute) and node.attr == "name":
            return recurse(node.value)  # field.name of a dataclasses.fields() item
        if isinstance(node, ast.Name):
            return self._name(node.id, where, depth, keys)
        return [ast.unparse(node)]

    def _with_targets(self, element, generators, where, depth) -> list[str]:
        bound = {t.id for g in generators for t in ast.walk(g.target) if isinstance(t, ast.Name)}
        leaves = []
        for node in ast.walk(element):
            if isinstance(node, ast.Name) and node.id in bound:
                continue
            if isinstance(node, ast.Name) and isinstance(node.ctx, ast.Load):
                leaves += self._name(node.id, where, depth + 1)
        return leaves

    def _name(self, name: str, where: ast.AST, depth: int, keys: bool = False) -> list[str]:
        function = self._function(where)
        scopes = [s for s in (function, self._module(where)) if s is not None]
        for scope in scopes:
            key = (id(scope), name)
            if key in self.visiting:
                return []  # a cycle (x = x + ...): its other bindings are traced already
            values = self._bindings(scope, name)
            if values is not None:
                self.visiting.add(key)
                try:
                    anchor = scope if scope is not function else where
                    return [p for v in values for p in self.unsafe(v, anchor, depth + 1, True)]
                finally:
                    self.visiting.discard(key)
            if scope is function and name in {a.arg for a in function.args.args}:
                return self._parameter(function, name, depth)
        imported = self._imported(self._module(where), name, depth)
        return [f"{name} (not traced)"] if imported is None else imported

    def _imported(self, module: ast.Module, name: str, depth: int) -> list[str] | None:
        """A name imported from another checked module, traced where that module binds it;
        None when it comes from elsewhere."""
        for node in module.body:
            if not isinstance(node, ast.ImportFrom) or not node.module:
                continue
            if not any(alias.name == name and alias.asname is None for alias in node.names):
                continue
            tree = self.trees.get(node.module.replace(".", "/") + ".py")
            values = None if tree is None else self._bindings(tree, name)
            if values is not None:
                return [p for v in values for p in self.unsafe(v, tree, depth + 1, True)]
        return None

    def _bindings(self, scope: ast.AST, name: str) -> list[ast.AST] | None:
        """Every value ``name`` gets in ``scope``: assignments, ``for`` targets (their
        iterables), ``.update`` calls (their dict or keyword names)."""
        values: list[ast.AST] = []
        found = False
        for node in ast.walk(scope):
            if isinstance(node, ast.Assign | ast.AnnAssign) and node.value is not None:
                targets = node.targets if isinstance(node, ast.Assign) else [node.target]
                for target in targets:
                    if isinstance(target, ast.Name) and target.id == name:
                        values.append(node.value)
                        found = True
                    elif isinstance(target, ast.Tuple) and isinstance(node.value, ast.Tuple):
                        for element, value in zip(target.elts, node.value.elts, strict=False):
                            if isinstance(element, ast.Name) and element.id == name:
                                values.append(value)
                                found = True
            elif (
                isinstance(node, ast.For)
                and isinstance(node.target, ast.Name)
                and (node.target.id == name)
            ):
                values.append(node.iter)
                found = True
            elif (
                isinstance(node, ast.Call)
                and isinstance(node.func, ast.Attribute)
                and node.func.attr == "update"
                and isinstance(node.func.value, ast.Name)
                and node.func.value.id == name
            ):
                values += node.args  # keyword names are code, not values
        return values if found else None

    def _parameter(self, function: ast.FunctionDef, name: str, depth: int) -> list[str]:
        """A parameter is safe when every call of its function passes a safe value."""
        position = [a.arg for a in function.args.args].index(name)
        offset = 1 if function.args.args and function.args.args[0].arg == "self" else 0
        leaves, calls = [], 0
        for tree in self.trees.values():
            for node in ast.walk(tree):
                if not isinstance(node, ast.Call):
                    continue
                func = node.func
                called = func.attr if isinstance(func, ast.Attribute) else getattr(func, "id", "")
                if called != function.name:
                    continue
                calls += 1
                passed = [k.value for k in node.keywords if k.arg == name]
                index = position - offset
                if not passed and index < len(node.args):
                    passed = [node.args[index]]
                for value in passed:
                    leaves += self.unsafe(value, node, depth + 1)
        return leaves if calls else [f"parameter {name} of {function.name} (never called)"]


def _labseq_sources() -> dict[str, str]:
    return {
        str(path.relative_to(ROOT)): path.read_text(encoding="utf-8")
        for path in sorted((ROOT / "labseq").rglob("*.py"))
    }


def test_sql_text_interpolates_only_code_defined_names() -> None:
    checker = SqlTextChecker(_labseq_sources())
    assert checker.interpolated() >= 5  # the store builds some statements: they were traced
    assert checker.problems() == []


def test_the_sql_check_catches_a_user_value_in_sql_text() -> None:
    bad = (
        "def note(db, text):\n"
        "    db.execute(f\"UPDATE runs SET notes = '{text}'\")\n"
        "def command(label):\n"
        "    note(db, label)\n"
        "def _count(db, table):\n"
        "    return db.execute(f'SELECT COUNT(*) FROM {table}')\n"
        "def totals(db):\n"
        "    return _count(db, 'runs'), _count(db, 'points')\n"
    )
    problems = SqlTextChecker({"bad.py": bad}).problems()
    assert len(problems) == 1 and "bad.py:2" in problems[0] and "label" in problems[0]


# -- no user string reaches an instrument with a separator or terminator ------------------


@pytest.mark.parametrize(
    ("key", "value"),
    [
        ("coupling", '"dc;*RST"'),
        ("coupling", '"dc\\n:CHAN1:OFFS 1000"'),
        ("trigger_slope", '"rising;:TRIG:LEV 0"'),
    ],
)
def test_scpi_words_from_a_sequence_are_refused_at_validation(
    tmp_path: Path, key: str, value: str
) -> None:
    path = demo_sequence(tmp_path)
    text = re.sub(
        rf"^{key} = .*$", lambda _: f"{key} = {value}", path.read_text(), count=1, flags=re.M
    )
    path.write_text(text)
    with pytest.raises(SequenceError, match=rf"scope\.{key}"):
        load_sequence(path)


@pytest.mark.parametrize(
    ("line", "hostile"),
    [
        ('single = ":SINGle"', 'single = ":SINGle;:CHAN1:OFFS 1000"'),
        ('stop = ":STOP"', 'stop = ":STOP\\n*RST"'),
        ("[commands]", '[words]\ncoupling = { dc = "DC;*RST" }\n\n[commands]'),
    ],
)
def test_scope_map_strings_with_separators_are_refused(
    tmp_path: Path, capsys, line: str, hostile: str
) -> None:
    generic = (ROOT / "instruments" / "command_maps" / "scope" / "generic.toml").read_text()
    assert line in generic
    (tmp_path / "map.toml").write_text(generic.replace(line, hostile, 1))
    sequence = demo_sequence(tmp_path)
    sequence.write_text(
        sequence.read_text().replace('scope_map = "generic"', 'scope_map = "map.toml"')
    )
    code, err = cli(capsys, "check", str(sequence))
    assert code == 2 and "bench.scope_map" in err and "refused" in err


def test_driver_refuses_separators_and_sends_nothing(make_sim_bench: Callable[..., SimBench]):
    bench = make_sim_bench()
    server = bench.servers["scope"]
    forward = server.interceptor
    seen: list[str] = []

    def record(message):  # type: ignore[no-untyped-def]
        seen.append(message.text)
        return forward(message) if forward else None

    server.interceptor = record
    with Oscilloscope.open(bench.resources["scope"], timeout_s=1) as scope:
        scope.configure_channel(1, 2.0, coupling="dc")
        before = list(seen)
        coupling = scope.query(":CHANnel1:COUPling?")
        for hostile in ("ac;*RST", "ac\n*RST", "ac\r", "ac\x00"):
            with pytest.raises((UnsafeTextError, LimitError)):
                scope.configure_channel(1, 2.0, coupling=hostile)
            with pytest.raises((UnsafeTextError, LimitError)):
                scope.configure_trigger(1, 10.0, slope=hostile)
        # Nothing was sent for the refused calls (only the read-back query above), and the
        # setting did not change.
        assert seen[len(before) :] == [":CHANnel1:COUPling?"]
        assert scope.query(":CHANnel1:COUPling?") == coupling == "DC"
