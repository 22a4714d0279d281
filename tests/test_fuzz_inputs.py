"""Bad input files: DUT files, scope command maps and waveform files, mutated by hypothesis.

Every case ends with a correct result, or a clear message naming the file and a non-zero exit
status (2 for bad input); never a traceback, never an "unexpected error", never a hang. Sequence
files are fuzzed in tests/test_sequence_fuzz.py; its TOML writer and value strategies are reused
here. The count of cases tried per target is printed.
"""

from __future__ import annotations

import io
import json
import math
import shutil
import subprocess
import tempfile
import tomllib
import zipfile
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sweeps import DEMO_DC, LABSEQ, run_cli
from test_sequence_fuzz import key_paths, to_toml, values
from test_waveform_files import assert_same_figures
from waveforms import record

from labseq.cli import main
from labseq_instruments.command_map import MAPS_DIR, CommandMap, load_command_map
from labseq_instruments.errors import CommandMapError
from labseq_sim_instruments.flyback import DEMO_DUTS, DutFileError, FlybackDesign, load_dut

DUT_TEXT = DEMO_DUTS["telecom_dc"].read_text(encoding="utf-8")
MAP_TEXT = (MAPS_DIR / "scope" / "generic.toml").read_text(encoding="utf-8")
#: The second shipped scope map uses the rest of the format: tables, scales, a conversion, a
#: preamble with text fields, set-up commands, words.
ALT_MAP_TEXT = (MAPS_DIR / "scope" / "alt.toml").read_text(encoding="utf-8")
FUZZ = settings(
    max_examples=150,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)


TRIED: Counter[str] = Counter()


@pytest.fixture
def tried() -> Counter[str]:
    """Cases tried per target across this module (printed by its last test)."""
    return TRIED


def cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    """Run ``labseq ARGS`` in this process; (exit status, stdout, stderr)."""
    capsys.readouterr()
    try:
        main(list(args))
        code = 0
    except SystemExit as exit_info:
        code = int(exit_info.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def assert_clear_failure(code: int, err: str, path: Path) -> None:
    """Exit status 2 with one ``labseq: error:`` line that names the file."""
    assert code == 2, err
    assert "labseq: error:" in err and str(path) in err, err
    assert "Traceback" not in err and "unexpected error" not in err, err


@st.composite
def mutated_toml(draw: st.DrawFn, text: str) -> str:
    """``text`` (TOML) with one to three keys dropped, renamed or given another value."""
    data = tomllib.loads(text)
    for _ in range(draw(st.integers(1, 3))):
        paths = key_paths(data)
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = data
        for key in path[:-1]:
            parent = parent[key]
        operation = draw(st.sampled_from(["drop", "rename", "replace"]))
        if operation == "drop":
            del parent[path[-1]]
        elif operation == "rename":
            parent["x_" + path[-1]] = parent.pop(path[-1])
        else:
            parent[path[-1]] = draw(values)
    return to_toml(data)


@st.composite
def mangled_text(draw: st.DrawFn, text: str) -> str:
    """``text`` with a slice cut out and random text put in its place."""
    at = draw(st.integers(0, len(text)))
    cut = draw(st.integers(0, 30))
    return text[:at] + draw(st.text(max_size=12)) + text[at + cut :]


# -- DUT files -----------------------------------------------------------------------------


def _check_design(design: FlybackDesign) -> None:
    """What a loaded DUT guarantees the physics: finite values, a sane line range."""
    for name, value in vars(design).items():
        if isinstance(value, float):
            assert math.isfinite(value), name
    assert 0 < design.line_min_v <= design.line_max_v


@FUZZ
@given(text=st.one_of(mutated_toml(DUT_TEXT), mangled_text(DUT_TEXT)))
def test_dut_files(
    tmp_path_factory: pytest.TempPathFactory,
    capsys: pytest.CaptureFixture[str],
    tried: Counter[str],
    text: str,
) -> None:
    tried["DUT file (load_dut, labseq sim)"] += 1
    path = tmp_path_factory.mktemp("dut") / "dut.toml"
    path.write_text(text, encoding="utf-8")
    try:
        design = load_dut(path)
    except DutFileError as error:
        assert str(path) in str(error)
        # `labseq sim --dut FILE` refuses it before any port is opened.
        code, _, err = cli(capsys, "sim", "--dut", str(path))
        assert_clear_failure(code, err, path)
    else:
        _check_design(design)


# -- scope command maps --------------------------------------------------------------------


def _check_map(command_map: CommandMap) -> None:
    """Every command of a loaded map renders with a channel and a value."""
    for key in command_map.commands:
        rendered = command_map.command(key, channel=1, value="1")
        assert rendered and ";" not in rendered and "\n" not in rendered


def _sequence_with_map(directory: Path) -> Path:
    text = DEMO_DC.read_text(encoding="utf-8").replace(
        'scope_map = "generic"', 'scope_map = "map.toml"'
    )
    sequence = directory / "sweep.toml"
    sequence.write_text(text, encoding="utf-8")
    return sequence


@FUZZ
@given(
    text=st.one_of(
        mutated_toml(MAP_TEXT),
        mangled_text(MAP_TEXT),
        mutated_toml(ALT_MAP_TEXT),
        mangled_text(ALT_MAP_TEXT),
    )
)
def test_command_map_files(
    tmp_path_factory: pytest.TempPathFactory,
    capsys: pytest.CaptureFixture[str],
    tried: Counter[str],
    text: str,
) -> None:
    tried["command map (load, labseq check)"] += 1
    directory = tmp_path_factory.mktemp("map")
    path = directory / "map.toml"
    path.write_text(text, encoding="utf-8")
    sequence = _sequence_with_map(directory)
    code, _, err = cli(capsys, "check", str(sequence))
    try:
        command_map = load_command_map(path)
    except CommandMapError as error:
        assert str(path) in str(error)
        assert_clear_failure(code, err, sequence)
        assert "bench.scope_map" in err and str(path) in err
    else:
        _check_map(command_map)
        assert code == 0, err


@pytest.mark.parametrize(
    ("change", "named"),
    [
        ('":TIMebase:SCALe {value}"', '":TIMebase:SCALe {value:>999999999}"'),
        ('":TIMebase:SCALe {value}"', '":TIMebase:SCALe {value!r}"'),
        ('":TIMebase:SCALe {value}"', '":TIMebase:SCALe {value.__class__}"'),
        ("code_min = -128", "code_min = nan"),
        ("vertical_divisions = 10", "vertical_divisions = inf"),
        ('acquisition_done_reply = "1"', 'acquisition_done_reply = " 1"'),
        ('stop = ":STOP"', 'stop = ":STOP;*RST"'),
    ],
)
def test_command_map_edge_cases_are_refused(tmp_path: Path, change: str, named: str) -> None:
    path = tmp_path / "map.toml"
    assert change in MAP_TEXT
    path.write_text(MAP_TEXT.replace(change, named, 1), encoding="utf-8")
    with pytest.raises(CommandMapError, match=str(path)):
        load_command_map(path)


# -- waveform files for `labseq analyze` ---------------------------------------------------

VOLTS, DT_S, T0_S = record(fs_hz=500e6, duration_s=4e-6)
TIME_S = T0_S + np.arange(VOLTS.size) * DT_S


def _csv(time_s: np.ndarray, volts: np.ndarray, header: str | None = "time_s,volts") -> bytes:
    lines = [] if header is None else [header]
    lines += [f"{t!r},{v!r}" for t, v in zip(time_s.tolist(), volts.tolist(), strict=True)]
    return ("\n".join(lines) + "\n").encode("utf-8")


def _npy(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=True)
    return buffer.getvalue()


def _npz(**arrays: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


@st.composite
def columns(draw: st.DrawFn) -> tuple[np.ndarray, np.ndarray]:
    """The good record, or one spoiled: NaN/inf, huge values, time going back, too short."""
    time_s, volts = TIME_S.copy(), VOLTS.copy()
    spoil = draw(
        st.sampled_from(["none", "nan", "inf", "huge", "backwards", "short", "flat", "gap"])
    )
    at = draw(st.integers(0, volts.size - 1))
    if spoil == "nan":
        (time_s if draw(st.booleans()) else volts)[at] = np.nan
    elif spoil == "inf":
        volts[at] = -np.inf
    elif spoil == "huge":
        volts = volts * draw(st.sampled_from([1e300, 1e-300, -1e200, 1e150]))
    elif spoil == "backwards":
        time_s[at:] -= 2 * DT_S
    elif spoil == "short":
        time_s, volts = time_s[: at % 40], volts[: at % 40]
    elif spoil == "flat":
        volts = np.zeros_like(volts)
    elif spoil == "gap":
        time_s[at:] += 5 * DT_S
    return time_s, volts


@st.composite
def csv_files(draw: st.DrawFn) -> bytes:
    time_s, volts = draw(columns())
    header = draw(st.sampled_from(["time_s,volts", None, "t,v", "time_s;volts", "time_s"]))
    data = _csv(time_s, volts, header)
    mutation = draw(st.sampled_from(["none", "text", "columns", "junk", "cut", "empty"]))
    at = draw(st.integers(0, max(len(data) - 1, 0)))
    if mutation == "text":
        data = data[:at] + draw(st.text(max_size=8)).encode("utf-8") + data[at:]
    elif mutation == "columns":
        data = data.replace(b"\n", b",1\n", draw(st.integers(1, 5)))
    elif mutation == "junk":
        data = data[:at] + draw(st.binary(min_size=1, max_size=64))
    elif mutation == "cut":
        data = data[:at]
    elif mutation == "empty":
        data = b""
    return data


ARRAYS = [
    lambda: np.column_stack([TIME_S, VOLTS]),
    lambda: VOLTS,
    lambda: np.column_stack([TIME_S, VOLTS, VOLTS]),
    lambda: np.column_stack([TIME_S, VOLTS]).T,
    lambda: np.zeros((4, 2, 2)),
    lambda: np.float64(3.0),
    lambda: np.column_stack([TIME_S, VOLTS]).astype(np.complex128),
    lambda: np.column_stack([TIME_S, VOLTS]).astype(str),
    lambda: np.array(["a", "b"] * 100).reshape(-1, 2),
    lambda: np.zeros((100, 2), dtype="datetime64[ns]"),
    lambda: np.zeros((0, 2)),
    lambda: np.array([[None, None]] * 40, dtype=object),
    lambda: np.array(
        list(zip(TIME_S, VOLTS, strict=True)), dtype=[("time_s", "f8"), ("volts", "f8")]
    ),
    lambda: np.array([(b"x", 1.0)] * 40, dtype=[("time_s", "S1"), ("volts", "f8")]),
    lambda: np.zeros(40, dtype=[("time_s", "M8[ns]"), ("volts", "f8")]),
    lambda: np.zeros(40, dtype=[("t", "f8"), ("v", "f8")]),
]


@st.composite
def npy_files(draw: st.DrawFn) -> bytes:
    if draw(st.booleans()):
        time_s, volts = draw(columns())
        return _npy(np.column_stack([time_s, volts]) if time_s.size else np.zeros((0, 2)))
    data = _npy(draw(st.sampled_from(ARRAYS))())
    if draw(st.booleans()):
        at = draw(st.integers(0, len(data)))
        data = data[:at] + draw(st.binary(max_size=16))
    return data


@st.composite
def npz_files(draw: st.DrawFn) -> bytes:
    time_s, volts = draw(columns())
    arrays = {"time_s": time_s, "volts": volts}
    layout = draw(st.sampled_from(["good", "missing", "renamed", "sizes", "2d", "other", "junk"]))
    if layout == "missing":
        arrays.pop(draw(st.sampled_from(sorted(arrays))))
    elif layout == "renamed":
        arrays = {"t": time_s, "v": volts}
    elif layout == "sizes":
        arrays["volts"] = volts[: volts.size // 2]
    elif layout == "2d":
        arrays["volts"] = np.column_stack([volts, volts])
    elif layout == "other":
        arrays["volts"] = draw(st.sampled_from(ARRAYS))()
    if layout == "junk":
        return draw(st.binary(max_size=200))
    try:
        return _npz(**arrays)
    except ValueError:  # arrays numpy itself cannot save
        return _npz()


class Blob(bytes):
    """File contents whose repr stays short in a failure report."""

    def __repr__(self) -> str:
        return f"<{len(self)} bytes: {bytes(self[:60])!r}…>"


def _strict_json(text: str) -> Any:
    """Parse JSON as the standard has it (RFC 8259: no NaN or Infinity)."""

    def refuse(constant: str) -> None:
        raise ValueError(f"{constant} is not JSON (RFC 8259)")

    return json.loads(text, parse_constant=refuse)


@FUZZ
@given(
    suffix_and_data=st.one_of(
        st.tuples(st.just(".csv"), csv_files().map(Blob)),
        st.tuples(st.just(".npy"), npy_files().map(Blob)),
        st.tuples(st.just(".npz"), npz_files().map(Blob)),
        st.tuples(st.sampled_from([".csv", ".npy", ".npz"]), st.binary(max_size=300).map(Blob)),
    )
)
def test_waveform_files_for_analyze(
    tmp_path_factory: pytest.TempPathFactory,
    capsys: pytest.CaptureFixture[str],
    tried: Counter[str],
    suffix_and_data: tuple[str, bytes],
) -> None:
    suffix, data = suffix_and_data
    tried[f"waveform file {suffix} (labseq analyze)"] += 1
    path = tmp_path_factory.mktemp("wave") / f"capture{suffix}"
    path.write_bytes(data)
    code, out, err = cli(capsys, "analyze", str(path), "--json")
    if code == 0:
        result = _strict_json(out)
        assert result["file"] == str(path)
    else:
        assert_clear_failure(code, err, path)


# -- text files as scopes and spreadsheets save them ---------------------------------------

PREAMBLE = [
    ("Model", "MX-2041"),
    ("Firmware Version", "1.4.2"),
    ("Record Length", "2000"),
    ("Probe Attenuation", "10X"),
    ("Trigger Level", "12.5"),
    ("Source", "CH1"),
    ("Date", "2024-05-01 10:22:31"),
]
TIME_UNITS = {"s": 1.0, "ms": 1e3, "us": 1e6, "µs": 1e6, "ns": 1e9}


@st.composite
def scope_text_files(draw: st.DrawFn) -> tuple[str, bytes, list[str]]:
    """(suffix, contents, analyze arguments) of the fuzz record written in a shape that scopes
    and spreadsheets write: every shape holds the same samples."""
    sep, comma = draw(
        st.sampled_from(
            [(",", False), (";", False), (";", True), ("\t", False), ("\t", True), ("   ", False)]
        )
    )
    mode = draw(st.sampled_from(["headerless", "header", "header+units", "preamble times"]))
    time_unit = draw(st.sampled_from(sorted(TIME_UNITS)))
    volts_unit = draw(st.sampled_from(["V", "mV"])) if mode in ("header", "header+units") else "V"
    extra = draw(st.integers(0, 2)) if mode != "preamble times" or draw(st.booleans()) else 0
    if mode == "preamble times" and extra == 0 and draw(st.booleans()):
        mode = "preamble times, headerless"
    position = draw(st.integers(0, extra))
    channel_style = draw(st.sampled_from(["CH{}", "Channel {}", "C{}"]))
    numbers = draw(st.permutations(range(1, extra + 2)))
    names = [channel_style.format(n) for n in numbers]
    columns = [VOLTS / (k + 2) for k in range(extra)]
    columns.insert(position, VOLTS)
    columns = [c * (1e3 if volts_unit == "mV" else 1.0) for c in columns]
    args: list[str] = []
    if extra:
        how = draw(
            st.sampled_from(
                ["name", "number"] if mode.startswith(("header", "pre")) else ["number"]
            )
        )
        if mode == "headerless":
            args += ["--channel", str(position + 1)]
        else:
            args += ["--channel", names[position] if how == "name" else str(numbers[position])]
    lines: list[str] = []
    for key, value in draw(st.lists(st.sampled_from(PREAMBLE), max_size=4, unique=True)):
        joint = draw(st.sampled_from([sep, ": "]))
        lines.append(draw(st.sampled_from(["", "# "])) + f"{key}{joint}{value}")
    if mode.startswith("preamble times"):
        lines += [f"Sample Interval: {DT_S!r}", f"Start Time: {T0_S!r}"]
        table = columns
        if mode == "preamble times":
            lines.append(sep.join(names))
    else:
        table = [TIME_S * TIME_UNITS[time_unit], *columns]
        # Between runs of spaces an empty cell cannot be written: a spaced units row states both.
        spaced_units = mode == "header+units" and sep == "   "
        stated = mode != "headerless" and (spaced_units or draw(st.booleans()))
        time_word = draw(st.sampled_from(["TIME", "time", "t", "X"]))
        if mode == "header":
            unit_forms = ["{} ({})", "{} [{}]", "{}/{}", "{}_{}"]
            time_name = (
                draw(st.sampled_from(unit_forms)).format(time_word, time_unit)
                if stated
                else time_word
            )
            volt_names = (
                [f"{name} ({volts_unit})" for name in names]
                if volts_unit == "mV" or draw(st.booleans())
                else names
            )
            lines.append(sep.join([time_name, *volt_names]))
        elif mode == "header+units":
            lines.append(sep.join([time_word, *names]))
            lines.append(sep.join([time_unit if stated else "", *[volts_unit] * len(names)]))
        if not stated and TIME_UNITS[time_unit] != 1.0:
            args += ["--time-unit", time_unit]
    text_rows = (
        sep.join(repr(x) for x in row) for row in zip(*(c.tolist() for c in table), strict=True)
    )
    body = "\n".join(text_rows)
    lines.append(body.replace(".", ",") if comma else body)
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    text = newline.join(lines) + newline
    encoding = draw(st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "latin-1"]))
    suffix = draw(st.sampled_from([".csv", ".txt", ".tsv", ".dat"]))
    return suffix, Blob(text.encode(encoding)), args


@st.composite
def spoiled(draw: st.DrawFn, data: bytes) -> bytes:
    """``data`` with a line dropped, doubled or swapped, text put in, or the end cut off."""
    lines = data.split(b"\n")
    at = draw(st.integers(0, len(lines) - 2))
    how = draw(st.sampled_from(["drop", "double", "swap", "text", "cut", "cell"]))
    if how == "drop":
        del lines[at]
    elif how == "double":
        lines.insert(at, lines[at])
    elif how == "swap":
        lines[at], lines[at + 1] = lines[at + 1], lines[at]
    elif how == "text":
        lines[at] += draw(st.text(max_size=8)).encode("utf-8")
    elif how == "cell":
        lines[at] = draw(st.sampled_from([b"", b"1", b"1,2,3", b"a;b", b"\t", b'"', b"nan"]))
    else:
        return data[: draw(st.integers(0, len(data)))]
    return b"\n".join(lines)


@FUZZ
@given(shape=scope_text_files(), data=st.data())
def test_scope_and_spreadsheet_text_files(
    tmp_path_factory: pytest.TempPathFactory,
    capsys: pytest.CaptureFixture[str],
    tried: Counter[str],
    shape: tuple[str, bytes, list[str]],
    data: st.DataObject,
) -> None:
    suffix, contents, args = shape
    spoil = data.draw(st.booleans(), label="spoil")
    if spoil:
        contents = Blob(data.draw(spoiled(contents), label="spoiled"))
    tried[f"text shapes{' spoiled' if spoil else ''} (labseq analyze)"] += 1
    path = tmp_path_factory.mktemp("shape") / f"capture{suffix}"
    path.write_bytes(contents)
    code, out, err = cli(capsys, "analyze", str(path), "--json", *args)
    if not spoil:
        # Every shape of the same samples gives the figures of the canonical file; only float
        # rounding of a converted time unit may differ, far inside 1e-9.
        assert code == 0, err
        result = _strict_json(out)
        result.pop("file")
        assert_same_figures(result, canonical_figures(), rel=1e-9)
    elif code == 0:
        assert _strict_json(out)["file"] == str(path)
    else:
        assert_clear_failure(code, err, path)


_CANONICAL: dict[str, Any] = {}


def canonical_figures() -> dict[str, Any]:
    """``labseq analyze --json`` of the fuzz record in labseq's own ``time_s,volts`` shape."""
    if not _CANONICAL:
        directory = Path(tempfile.mkdtemp())
        path = directory / "canonical.csv"
        path.write_bytes(_csv(TIME_S, VOLTS))
        code, out, err = run_cli("analyze", str(path), "--json")
        assert code == 0, err
        _CANONICAL.update(json.loads(out))
        _CANONICAL.pop("file")
        shutil.rmtree(directory)
    return _CANONICAL


def test_the_unspoiled_waveform_is_analysed(tmp_path: Path, capsys) -> None:
    """The fuzzers' base record is valid, so their failures come from the spoiling."""
    path = tmp_path / "good.csv"
    path.write_bytes(_csv(TIME_S, VOLTS))
    code, out, err = cli(capsys, "analyze", str(path), "--json")
    assert code == 0, err
    # waveforms.flyback_node's ring is 20 MHz by construction.
    ring_hz = _strict_json(out)["edges"][0]["ring_frequency_hz"]
    assert ring_hz == pytest.approx(20e6, rel=0.02)


@pytest.mark.parametrize(
    ("args", "name"),
    [
        (["sim", "--dut", "{dir}/bad_dut.toml"], "bad_dut.toml"),
        (["analyze", "{dir}/junk.npz", "--json"], "junk.npz"),
        (["check", "{dir}/sweep.toml"], "sweep.toml"),
    ],
)
def test_bad_files_in_a_real_process(tmp_path: Path, args: list[str], name: str) -> None:
    (tmp_path / "bad_dut.toml").write_text(DUT_TEXT.replace('rating = "150 V"', "rating = []"))
    (tmp_path / "junk.npz").write_bytes(b"PK\x03\x04" + bytes(40))
    (tmp_path / "map.toml").write_text(MAP_TEXT.replace("channels = 4", "channels = 0"))
    _sequence_with_map(tmp_path)
    done = subprocess.run(
        [*LABSEQ, *(arg.format(dir=tmp_path) for arg in args)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 2, done.stderr
    assert name in done.stderr and "Traceback" not in done.stderr
    assert done.stderr.startswith("labseq: error:")


def test_zip_that_is_not_npz(tmp_path: Path, capsys) -> None:
    path = tmp_path / "other.npz"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("readme.txt", "not arrays")
    code, _, err = cli(capsys, "analyze", str(path))
    assert_clear_failure(code, err, path)


def test_cases_tried_per_target(capsys: pytest.CaptureFixture[str]) -> None:
    """Print how many cases each fuzzed target saw (runs last in this module)."""
    if not TRIED:
        pytest.skip("the fuzz tests of this module did not run in this session")
    with capsys.disabled():
        print("\nbad-input cases tried per target:")
        for target, count in sorted(TRIED.items()):
            print(f"  {target:<38} {count}")
    assert all(count >= 10 for count in TRIED.values()), TRIED
