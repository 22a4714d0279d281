"""Waveform files for ``labseq analyze``: every shape scopes and spreadsheets save gives the same
figures as labseq's own ``time_s,volts`` file of the same record; labseq's own exports are read
back with their scaling; bad files are refused naming the file, line, column or key."""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from sweeps import run_cli
from test_store import new_run
from waveforms import record

from labseq.analysis import analyze_capture
from labseq.store import CaptureRecord, Store
from labseq.waveform_files.text import HEAD_BYTES
from labseq_instruments import Waveform

#: The scope's screen in the exported captures: 8-bit codes over −50…750 V.
LSB_V, ORIGIN_V = 800.0 / 256, 350.0


def digitised(ring_amp_v: float) -> Waveform:
    """The shared synthetic flyback node (20 MHz ring) on an 8-bit screen of −50…750 V."""
    volts, dt_s, t0_s = record(fs_hz=500e6, duration_s=4e-6, ring_amps_v=(ring_amp_v,))
    codes = np.clip(np.round((volts - ORIGIN_V) / LSB_V), -128, 127).astype(np.int8)
    return Waveform(codes, dt_s, t0_s, LSB_V, ORIGIN_V, 0.0, code_min=-128, code_max=127)


@pytest.fixture
def exported(tmp_path: Path) -> tuple[Path, Path]:
    """A store with one point of two captures (the second clipped at the top of the screen),
    exported by ``labseq export`` as NPZ and as CSV; (the directory, the store)."""
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        _, [point] = new_run(store, points=1)
        store.commit_point(
            point, captures=[CaptureRecord(digitised(a), node="primary") for a in (90.0, 400.0)]
        )
    for kind in ("npz", "csv"):
        out = tmp_path / kind
        code, _, err = run_cli(
            "export", "1", "--db", str(db), "--out", str(out), "--captures", kind
        )
        assert code == 0, err
    return tmp_path, db


def assert_same_figures(got: object, expected: object, rel: float, path: str = "") -> None:
    """``got`` equals ``expected`` (nested dicts and lists of figures), floats within ``rel``."""
    if isinstance(expected, dict):
        assert isinstance(got, dict) and got.keys() == expected.keys(), path
        for key, value in expected.items():
            assert_same_figures(got[key], value, rel, f"{path}.{key}")
    elif isinstance(expected, list):
        assert isinstance(got, list) and len(got) == len(expected), path
        for index, (a, b) in enumerate(zip(got, expected, strict=True)):
            assert_same_figures(a, b, rel, f"{path}[{index}]")
    elif isinstance(expected, float) and not isinstance(got, bool):
        assert got == pytest.approx(expected, rel=rel, abs=1e-15), path
    else:
        assert got == expected, path


def analyze_json(*args: str) -> dict:
    code, out, err = run_cli("analyze", *args, "--json")
    assert code == 0, err
    result = json.loads(out)
    result.pop("file")
    return result


def test_analyze_reads_labseq_npz_export(exported: tuple[Path, Path]) -> None:
    tmp_path, db = exported
    npz = tmp_path / "npz" / "captures.npz"
    from_npz = analyze_json(str(npz), "--capture", "p000_c00")
    # The same capture exported as a time_s,volts CSV gives the same figures.
    from_csv = analyze_json(str(tmp_path / "csv/captures/p000_c00.csv"))
    assert_same_figures(from_npz, from_csv, rel=1e-9)
    # And both agree with the analysis of the stored codes with their scaling (as the runner
    # analyses a capture: volts from codes, the clip mask from the screen's limits).
    with Store(db, create=False) as store:
        stored = store.captures(1)
    for name, capture in zip(("p000_c00", "p000_c01"), stored, strict=True):
        expected = analyze_capture(
            capture.volts(), capture.x_increment_s, capture.x_origin_s, clipped=capture.clip_mask()
        ).as_dict()
        assert_same_figures(analyze_json(str(npz), "--capture", name), expected, rel=0)
    # The second capture reached the top of the screen: its peak is a lower bound.
    clipped = analyze_json(str(npz), "--capture", "p000_c01")
    assert clipped["clipped"] is True and from_npz["clipped"] is False
    assert clipped["peak_v"] == pytest.approx(ORIGIN_V + 127 * LSB_V)


def test_export_errors_name_the_captures(exported: tuple[Path, Path]) -> None:
    npz = exported[0] / "npz" / "captures.npz"
    for args, message in [
        ([], "2 captures ('p000_c00', 'p000_c01'); choose one with --capture NAME"),
        (["--capture", "p001_c01"], "no capture 'p001_c01'"),
        (["--capture", "p000_c00", "--channel", "2"], "--channel does not apply"),
        (["--capture", "p000_c00", "--time-unit", "us"], "gives times in seconds"),
    ]:
        code, _, err = run_cli("analyze", str(npz), *args)
        assert code == 2 and str(npz) in err and message in err, err
        assert "the export holds 'p000_c00', 'p000_c01'" in err or args != ["--capture", "p001_c01"]


# -- the shapes of text files ----------------------------------------------------------------

#: The shared synthetic flyback node: 20 MHz ring, 2000 samples at 500 MS/s from −1 µs.
VOLTS, DT_S, T0_S = record(fs_hz=500e6, duration_s=4e-6)
TIME_S = T0_S + np.arange(VOLTS.size) * DT_S


def rows(*columns: np.ndarray, sep: str = ",", comma: bool = False, end: str = "\n") -> str:
    """Data rows of the columns, each number as Python writes it (shortest exact repr)."""
    lines = (
        sep.join(repr(x) for x in row) for row in zip(*(c.tolist() for c in columns), strict=True)
    )
    text = end.join(lines) + end
    return text.replace(".", ",") if comma else text


#: name → (file name, contents, extra analyze arguments). Each holds the record above.
SHAPES: dict[str, tuple[str, Callable[[], str | bytes], list[str]]] = {
    "TIME,CH1 header": ("a.csv", lambda: "TIME,CH1\n" + rows(TIME_S, VOLTS), []),
    "scope preamble": (
        "a.csv",
        lambda: (
            "Model,MX-2041\nFirmware Version,1.4.2\nRecord Length,2000\n"
            f"Sample Interval,{DT_S!r}\nTrigger Point,500\nSource,CH1\n\n"
            "TIME,CH1\n" + rows(TIME_S, VOLTS)
        ),
        [],
    ),
    "semicolons and decimal commas": (
        "a.csv",
        lambda: "Time;Voltage\n" + rows(TIME_S, VOLTS, sep=";", comma=True),
        [],
    ),
    "byte-order mark, CRLF, units in brackets": (
        "a.csv",
        lambda: "\ufeffTime (s),CH1 (V)\r\n" + rows(TIME_S, VOLTS, end="\r\n"),
        [],
    ),
    "units row": ("a.csv", lambda: "X,Y\ns,V\n" + rows(TIME_S, VOLTS), []),
    "three columns, --channel by name": (
        "a.csv",
        lambda: "TIME,CH1,CH2\n" + rows(TIME_S, VOLTS / 10, VOLTS),
        ["--channel", "ch2"],
    ),
    "three columns, --channel by scope channel": (
        "a.csv",
        lambda: "TIME,CH3,CH4\n" + rows(TIME_S, VOLTS / 10, VOLTS),
        ["--channel", "4"],
    ),
    "no header, three columns, --channel by position": (
        "a.csv",
        lambda: rows(TIME_S, VOLTS, VOLTS / 10),
        ["--channel", "1"],
    ),
    "times in µs, --time-unit": (
        "a.csv",
        lambda: "t,v\n" + rows(TIME_S * 1e6, VOLTS),
        ["--time-unit", "us"],
    ),
    "times in ns and volts in mV in the header, tabs": (
        "a.tsv",
        lambda: "Time/ns\tCH1 [mV]\n" + rows(TIME_S * 1e9, VOLTS * 1e3, sep="\t"),
        [],
    ),
    "no time column: preamble interval and start": (
        "a.txt",
        lambda: f"# Sample Interval: {DT_S!r}\n# Start Time: {T0_S!r}\nCH1\n" + rows(VOLTS),
        [],
    ),
    "no time column: preamble sample rate, interval in ps": (
        "a.txt",
        lambda: f"Sample Rate: 500 MSa/s\nX Origin: {T0_S * 1e12!r} ps\n" + rows(VOLTS),
        [],
    ),
    "UTF-16 tab text with decimal commas (spreadsheet)": (
        "a.txt",
        lambda: ("Time (s)\tCH1 (V)\n" + rows(TIME_S, VOLTS, sep="\t", comma=True)).encode(
            "utf-16"
        ),
        [],
    ),
    "space aligned": (
        "a.dat",
        lambda: "  Time (s)     CH1 (V)\n" + rows(TIME_S, VOLTS, sep="     "),
        [],
    ),
    "quoted cells, trailing delimiter": (
        "a.csv",
        lambda: (
            '"Time","CH1",\n'
            + "".join(
                f'"{t!r}","{v!r}",\n' for t, v in zip(TIME_S.tolist(), VOLTS.tolist(), strict=True)
            )
        ),
        [],
    ),
    "Latin-1 header with µs": (
        "a.csv",
        lambda: ("Time (µs);CH1\n" + rows(TIME_S * 1e6, VOLTS, sep=";", comma=True)).encode(
            "latin-1"
        ),
        [],
    ),
    "N×3 array, --channel": (
        "a.npy",
        lambda: np.column_stack([TIME_S, VOLTS / 3, VOLTS]),
        ["--channel", "2"],
    ),
}


def write_shape(directory: Path, name: str) -> tuple[Path, list[str]]:
    file_name, contents, args = SHAPES[name]
    path = directory / file_name
    data = contents()
    if isinstance(data, np.ndarray):
        np.save(path, data)
    elif isinstance(data, bytes):
        path.write_bytes(data)
    else:
        path.write_bytes(data.encode("utf-8"))
    return path, args


@pytest.fixture(scope="module")
def canonical_figures(tmp_path_factory: pytest.TempPathFactory) -> dict:
    path = tmp_path_factory.mktemp("canonical") / "record.csv"
    path.write_text("time_s,volts\n" + rows(TIME_S, VOLTS), encoding="utf-8")
    code, out, err = run_cli("analyze", str(path), "--json")
    assert code == 0 and err == "", err  # labseq's own shape needs no note
    figures = json.loads(out)
    # tests/waveforms.flyback_node rings at 20 MHz by construction: the reference is sound.
    assert figures["ring_frequency_hz"] == pytest.approx(20e6, rel=0.01)
    return {key: value for key, value in figures.items() if key != "file"}


@pytest.mark.parametrize("shape", SHAPES)
def test_every_shape_gives_the_canonical_figures(
    tmp_path: Path, canonical_figures: dict, shape: str
) -> None:
    path, args = write_shape(tmp_path, shape)
    code, out, err = run_cli("analyze", str(path), "--json", *args)
    assert code == 0, err
    # The same samples: only the time base may differ by float rounding (a unit converted, an
    # interval given instead of computed from the times), far inside 1e-9.
    assert_same_figures(
        {k: v for k, v in json.loads(out).items() if k != "file"}, canonical_figures, rel=1e-9
    )
    # What was read is said beside the result.
    assert err.startswith(f"{path}: read volts from column "), err


# -- bad files -------------------------------------------------------------------------------

GOOD = "TIME,CH1\n" + rows(TIME_S, VOLTS)


def replace_line(text: str, number: int, new: str) -> str:
    lines = text.split("\n")
    lines[number - 1] = new
    return "\n".join(lines)


BAD: list[tuple[str, str, list[str], str]] = [
    (
        "bad cell",
        replace_line(GOOD, 7, "1e-9,abc"),
        [],
        "line 7, column 'CH1': 'abc' is not a number",
    ),
    (
        "short row",
        replace_line(GOOD, 1500, "1e-9"),
        [],
        "line 1500 has 1 value(s); the data has 2 per row",
    ),
    (
        "long row",
        replace_line(GOOD, 9, "1,2,3"),
        [],
        "line 9 has 3 value(s); the data has 2 per row",
    ),
    (
        "time goes back",
        replace_line(GOOD, 40, f"{TIME_S[30].item()!r},{VOLTS[38].item()!r}"),
        [],
        "time (column 'TIME') does not increase at line 40",
    ),
    ("non-finite", replace_line(GOOD, 41, f"{TIME_S[39].item()!r},nan"), [], "first at line 41"),
    (
        "numbers above the data",
        "Model,MX-2041\n1,2,3\nTIME,CH1\n" + rows(TIME_S, VOLTS),
        [],
        "line 2 holds 3 number(s) but the data from line 4 on holds 2 per row",
    ),
    (
        "two voltage columns, none chosen",
        "TIME,CH1,CH2\n" + rows(TIME_S, VOLTS, VOLTS),
        [],
        "2 voltage columns (1: 'CH1', 2: 'CH2'); choose one with --channel NAME or --channel N",
    ),
    (
        "unknown channel",
        "TIME,CH1,CH2\n" + rows(TIME_S, VOLTS, VOLTS),
        ["--channel", "CH9"],
        "--channel 'CH9' matches no voltage column(s) of 1: 'CH1', 2: 'CH2'",
    ),
    (
        "a current column",
        "Time (s),I (A)\n" + rows(TIME_S, VOLTS),
        [],
        "column 'I' is in 'A'; analyze needs a voltage column (V, mV or kV)",
    ),
    (
        "--time-unit against the file's unit",
        "Time (s),CH1\n" + rows(TIME_S, VOLTS),
        ["--time-unit", "ns"],
        "column 'Time' gives times in 's'; --time-unit 'ns' disagrees",
    ),
    (
        "--time-unit that is no time",
        GOOD,
        ["--time-unit", "furlong"],
        "--time-unit 'furlong': give a time unit",
    ),
    ("one column, no interval", rows(VOLTS), [], "no time column and no sample interval"),
    (
        "a header without a time column",
        "CH1\n" + rows(VOLTS),
        [],
        "no time column among the names on line 1 ('CH1'); name it time, t, x or s",
    ),
    (
        "preamble interval that is no time",
        "Sample Interval: fast\nCH1\n" + rows(VOLTS),
        [],
        "line 1: 'fast' is not a time",
    ),
    ("--capture on a text file", GOOD, ["--capture", "p000_c00"], "--capture does not apply"),
    ("header only", "TIME,CH1\n", [], "no data rows"),
]


@pytest.mark.parametrize(
    ("content", "args", "message"), [case[1:] for case in BAD], ids=[case[0] for case in BAD]
)
def test_bad_text_files_name_the_place(
    tmp_path: Path, content: str, args: list[str], message: str
) -> None:
    path = tmp_path / "bad.csv"
    path.write_text(content, encoding="utf-8")
    code, _, err = run_cli("analyze", str(path), *args)
    assert code == 2, err
    assert err.startswith(f"labseq: error: {path}: ") and message in err, err


def test_binary_and_huge_lines_are_not_echoed(tmp_path: Path) -> None:
    binary = tmp_path / "scope.csv"
    binary.write_bytes(bytes(range(256)) * 8)
    code, _, err = run_cli("analyze", str(binary))
    assert code == 2 and "binary data, not text" in err
    one_line = tmp_path / "one-line.csv"
    one_line.write_text("1.5," * 100_000)
    code, _, err = run_cli("analyze", str(one_line))
    assert code == 2 and f"line 1 is longer than {HEAD_BYTES // 1024} KiB" in err
    assert len(err) < 400, err  # the line is quoted cut short, not echoed whole
    buried = tmp_path / "buried.csv"
    buried.write_text(replace_line(GOOD, 1800, "x" * 500_000))
    code, _, err = run_cli("analyze", str(buried))
    assert code == 2 and "line 1800 has 1 value(s)" in err and len(err) < 400, err


def test_fifo_and_device_are_refused_by_kind(tmp_path: Path) -> None:
    fifo = tmp_path / "scope.csv"
    os.mkfifo(fifo)  # nobody writes to it: opening it would block for ever
    code, _, err = run_cli("analyze", str(fifo))
    assert code == 2 and "is a named pipe (FIFO), not a waveform file" in err, err
    code, _, err = run_cli("analyze", os.devnull)
    assert code == 2 and "is a character device" in err and "no such file" not in err, err
    code, _, err = run_cli("analyze", str(tmp_path / "absent.csv"))
    assert code == 2 and "no such file" in err


def test_times_without_a_unit_that_look_like_microseconds_are_flagged(tmp_path: Path) -> None:
    path = tmp_path / "us.csv"
    path.write_text("time_s,volts\n" + rows(TIME_S * 1e6, VOLTS))
    code, _, err = run_cli("analyze", str(path), "--json")
    assert code == 0
    assert "states no time unit" not in err  # time_s says seconds: the user wrote them so
    path.write_text(rows(TIME_S * 1e6, VOLTS))
    code, _, err = run_cli("analyze", str(path), "--json")
    assert code == 0 and "give --time-unit if the times are in ms, µs or ns" in err, err
