"""Sequence files: the shipped ones load; every class of mistake is a SequenceError naming the
file, the key and what would be valid; the CLI turns them into exit status 2."""

from __future__ import annotations

import hashlib
import re
from collections.abc import Callable
from pathlib import Path

import pytest
from sweeps import run_cli

from labseq.errors import InputError
from labseq.sequence import (
    BenchLimits,
    GridPoint,
    SequenceError,
    load_sequence,
    parse_sequence,
)
from labseq_instruments.tomlkeys import find_key_line

ROOT = Path(__file__).resolve().parent.parent
SEQUENCES = ROOT / "labseq" / "examples"
DEMO_DC = SEQUENCES / "demo_dc_flyback.toml"
TEMPLATE = SEQUENCES / "template_real_bench.toml"


def edited(base: Path, tmp_path: Path, edit: Callable[[str], str]) -> Path:
    """A copy of ``base`` in ``tmp_path`` with ``edit`` applied to its text."""
    text = base.read_text(encoding="utf-8")
    changed = edit(text)
    assert changed != text, "the edit must change the file"
    path = tmp_path / base.name
    path.write_text(changed, encoding="utf-8")
    return path


def replace_line(key: str, new: str | None) -> Callable[[str], str]:
    """Edit that replaces the first ``key = ...`` line (or deletes it when ``new`` is None)."""

    def edit(text: str) -> str:
        pattern = re.compile(rf"^{re.escape(key)}\s*=.*$\n?", re.MULTILINE)
        return pattern.sub("" if new is None else new + "\n", text, count=1)

    return edit


def problems_of(path: Path) -> SequenceError:
    with pytest.raises(SequenceError) as info:
        load_sequence(path)
    assert str(path) in str(info.value)
    return info.value


# --------------------------------------------------------------------------- shipped files


def acknowledged(text: str) -> str:
    """The edit a user makes once the bench is set up for hazardous voltage."""
    return text.replace(
        "hazardous_voltage_acknowledged = false", "hazardous_voltage_acknowledged = true"
    )


@pytest.mark.parametrize(
    "name", ["demo_dc_flyback.toml", "demo_offline_flyback.toml", "template_real_bench.toml"]
)
def test_shipped_files_load(name: str, tmp_path: Path) -> None:
    # The template drives a real bench above ES1 (see the next test): it loads once acknowledged.
    path = edited(TEMPLATE, tmp_path, acknowledged) if name == TEMPLATE.name else SEQUENCES / name
    sequence = load_sequence(path)
    points = sequence.points()
    assert len(points) == len(sequence.grid.line_values_v) * len(sequence.grid.load_values_a)
    # Lines ascending, loads ascending inside each line value.
    assert points == sorted(points)
    assert sequence.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert sequence.text == path.read_text(encoding="utf-8")


def test_demo_dc_values_in_si() -> None:
    sequence = load_sequence(DEMO_DC)
    # SI prefixes p = 1e-12, k = 1e3, n = 1e-9 (BIPM SI brochure, 9th edition, table 7).
    assert sequence.snubber.capacitance_f == pytest.approx(220e-12)
    assert sequence.dut.switching_frequency_hz == pytest.approx(200e3)
    assert sequence.acquisition.time_per_div_s == pytest.approx(2e-6)
    assert sequence.primary.limits.max_settling_time_s == pytest.approx(500e-9)
    assert sequence.primary.limits.min_efficiency == pytest.approx(0.80)
    # Loads given in percent of the rated 2.2 A.
    assert sequence.grid.load_values_a == pytest.approx((0.55, 1.1, 1.65, 2.2))
    # Defaults: peak limit = rating x derating (0.8, from memory of common power-supply
    # derating guidelines); loss limit = the resistor's budget.
    assert sequence.primary.limits.max_peak_v == pytest.approx(150.0 * 0.8)
    assert sequence.primary.limits.max_snubber_loss_w == pytest.approx(0.5)
    assert sequence.bench.simulated and sequence.bench.settings.dut_path.is_file()
    assert sequence.points()[0] == GridPoint(36.0, pytest.approx(0.55))


def test_demo_scope_settings_cover_a_switching_period() -> None:
    for name in ("demo_dc_flyback.toml", "demo_offline_flyback.toml"):
        sequence = load_sequence(SEQUENCES / name)
        scope = sequence.acquisition
        record_s = scope.time_per_div_s * 10  # 10 horizontal divisions (generic map)
        sample_rate_hz = scope.record_length / record_s
        assert sample_rate_hz >= 250e6
        assert record_s >= 1.0 / sequence.dut.switching_frequency_hz
        assert 10_000 <= scope.record_length <= 20_000


def test_node_limits_are_the_analysis_limits() -> None:
    verdict = pytest.importorskip("labseq.analysis.verdict")
    primary = load_sequence(DEMO_DC).primary
    limits = primary.limits
    assert isinstance(limits, verdict.Limits)
    assert primary.settling_band == pytest.approx(0.05)
    assert limits.max_peak_v == pytest.approx(120.0)
    assert limits.min_damping_ratio == pytest.approx(0.1)
    assert limits.max_q_factor is None


def test_ramp_never_steps_further_than_declared() -> None:
    limits = BenchLimits(80.0, 3.0, 5.0, line_step_max_v=10.0, line_step_dwell_s=0.0)
    ramp = limits.ramp_v(36.0, 75.0)
    assert ramp[-1] == 75.0
    steps = [b - a for a, b in zip([36.0, *ramp[:-1]], ramp, strict=True)]
    assert max(steps) <= 10.0 + 1e-12 and len(ramp) == 4
    assert limits.ramp_v(75.0, 70.0) == [70.0]
    assert limits.ramp_v(48.0, 48.0) == []


def test_find_key_line() -> None:
    text = 'name = "x"\n\n[grid]\nline_values = [1, 2]\n[bench.limits]\nline_step_max = 3\n'
    assert find_key_line(text, "grid.line_values[1]") == 4
    assert find_key_line(text, "bench.limits.line_step_max") == 6
    assert find_key_line(text, "grid.settle") == 3  # missing key: its table's header
    assert find_key_line(text, "nothing") is None


# --------------------------------------------------------------------------- each class of error

ERROR_CASES = [
    # (id, edit, key named, words in the message)
    (
        "unknown key",
        replace_line("settle", 'setle = "50 ms"'),
        "grid.setle",
        "did you mean 'settle'",
    ),
    ("missing key", replace_line("rated_load", None), "dut.rated_load", "missing"),
    (
        "wrong type",
        replace_line("captures_per_point", "captures_per_point = [3]"),
        "grid.captures_per_point",
        "expected a number",
    ),
    ("wrong type text", replace_line("label", "label = 5"), "dut.label", "expected a string"),
    (
        "bad unit",
        replace_line("volts_per_div", 'volts_per_div = "25 Hz"'),
        "scope.volts_per_div",
        "expected V",
    ),
    (
        "bad prefix",
        replace_line("capacitance", 'capacitance = "220 qF"'),
        "snubber.capacitance",
        "SI prefix",
    ),
    (
        "non-positive",
        replace_line("capacitance", 'capacitance = "-220pF"'),
        "snubber.capacitance",
        "must be >",
    ),
    (
        "zero",
        replace_line("record_length", "record_length = 0"),
        "scope.record_length",
        "whole number",
    ),
    (
        "bad choice",
        replace_line("trigger_slope", 'trigger_slope = "up"'),
        "scope.trigger_slope",
        '"rising" or "falling"',
    ),
    (
        "bad fraction",
        replace_line("settling_band", "settling_band = 5"),
        "limits.settling_band",
        "'80 %'",
    ),
    (
        "line above DUT range",
        replace_line("line_values", 'line_values = ["36 V", "48 V", "60 V", "78 V"]'),
        "grid.line_values[3]",
        "valid: 36 V to 75 V",
    ),
    (
        "line above source max",
        replace_line("source_max_voltage", 'source_max_voltage = "70 V"'),
        "grid.line_values[3]",
        "source_max_voltage 70 V",
    ),
    (
        "load above rated",
        replace_line("load_values", 'load_values = ["0.5 A", "2.5 A"]'),
        "grid.load_values[1]",
        "rated load 2.2 A",
    ),
    (
        "load above bench",
        replace_line("load_max_current", 'load_max_current = "2 A"'),
        "grid.load_values[3]",
        "load_max_current 2 A",
    ),
    (
        "duplicate point",
        replace_line("load_values", 'load_values = ["25 %", "0.55 A"]'),
        "grid.load_values[1]",
        "duplicate point",
    ),
    (
        "AC/DC mismatch",
        lambda t: t.replace(
            'line_kind = "dc"\nline_values',
            'line_kind = "ac"\nline_frequency = "50 Hz"\nline_values',
        ),
        "grid.line_kind",
        "must match",
    ),
    (
        "DC with frequency",
        lambda t: t.replace("settle =", 'line_frequency = "50 Hz"\nsettle ='),
        "grid.line_frequency",
        "only for",
    ),
    ("unknown demo DUT", replace_line("dut", 'dut = "no_such_dut"'), "bench.dut", "telecom_dc"),
    (
        "unknown scope family",
        replace_line("scope_map", 'scope_map = "no_such_scope"'),
        "bench.scope_map",
        "generic",
    ),
    (
        "peak limit above rating",
        lambda t: t.replace("[limits]", '[limits]\nmax_peak = "160 V"'),
        "limits.max_peak",
        "switch rating 150 V",
    ),
    (
        "probe below rating",
        replace_line("probe_max_voltage", 'probe_max_voltage = "100 V"'),
        "bench.limits.probe_max_voltage",
        "below the switch rating",
    ),
    ("unknown section", lambda t: t + '\n[grd]\nsettle = "1 s"\n', "grd", "did you mean 'grid'"),
]


@pytest.mark.parametrize(
    ("edit", "key", "words"), [case[1:] for case in ERROR_CASES], ids=[c[0] for c in ERROR_CASES]
)
def test_each_mistake_is_named(
    tmp_path: Path, edit: Callable[[str], str], key: str, words: str
) -> None:
    path = edited(DEMO_DC, tmp_path, edit)
    error = problems_of(path)
    assert isinstance(error, InputError) and error.exit_code == 2
    matching = [p for p in error.problems if p.key == key]
    assert matching, f"no problem for {key}: {error}"
    assert any(words in p.message for p in matching), str(error)
    assert key in str(error) and words in str(error)


def test_value_error_points_at_its_line(tmp_path: Path) -> None:
    path = edited(DEMO_DC, tmp_path, replace_line("resistance", 'resistance = "47 V"'))
    error = problems_of(path)
    expected_line = 1 + path.read_text().splitlines().index('resistance = "47 V"')
    assert [p.line for p in error.problems if p.key == "snubber.resistance"] == [expected_line]
    assert f"line {expected_line}, snubber.resistance" in str(error)


def test_toml_syntax_error_gives_line(tmp_path: Path) -> None:
    def break_line_12(text: str) -> str:
        lines = text.splitlines()
        lines[11] = "this is = = not toml"
        return "\n".join(lines) + "\n"

    error = problems_of(edited(DEMO_DC, tmp_path, break_line_12))
    assert error.problems[0].line == 12
    assert "not valid TOML" in str(error) and "line 12" in str(error)


def test_several_problems_reported_at_once(tmp_path: Path) -> None:
    def many(text: str) -> str:
        text = replace_line("settle", 'setle = "5 ms"')(text)
        text = replace_line("volts_per_div", 'volts_per_div = "25 Hz"')(text)
        return replace_line("channel", "channel = -1")(text)

    error = problems_of(edited(DEMO_DC, tmp_path, many))
    keys = {p.key for p in error.problems}
    assert {"grid.setle", "grid.settle", "scope.volts_per_div", "scope.channel"} <= keys
    assert "4 problems" in str(error)


def test_real_bench_above_es1_needs_acknowledgement(tmp_path: Path) -> None:
    # ES1 limits of IEC 62368-1: 60 V DC, 30 V AC rms (from memory). The template's line stays
    # at or below 60 V DC, but its switch node swings to the bus plus the reflected voltage plus
    # the leakage spike, up to the declared 150 V rating: the value that trips is the rating.
    error = problems_of(TEMPLATE)
    assert [p.key for p in error.problems] == ["safety.hazardous_voltage_acknowledged"]
    assert "150 V" in str(error) and "dut.switch_rating" in str(error) and "60 V" in str(error)
    assert load_sequence(edited(TEMPLATE, tmp_path, acknowledged)).hazardous_voltage_acknowledged


def test_es1_gate_names_the_line_or_a_node_rating(tmp_path: Path) -> None:
    # A 12 V bench whose devices are rated 40 V stays inside ES1 (60 V DC): no acknowledgement.
    def low_voltage(text: str) -> str:
        for key, value in [
            ("line_min", '"9 V"'),
            ("line_max", '"15 V"'),
            ("switch_rating", '"40 V"'),
            ("line_values", '["12 V"]'),
            ("probe_max_voltage", '"300 V"'),
        ]:
            text = replace_line(key, f"{key} = {value}")(text)
        return text

    low = edited(TEMPLATE, tmp_path, low_voltage)
    assert not load_sequence(low).hazardous_voltage_acknowledged
    assert load_sequence(low).above_es1() is None

    # An AC line of 40 V rms is above the 30 V rms limit even with 40 V devices.
    def ac_line(text: str) -> str:
        text = low_voltage(text).replace('line_kind = "dc"', 'line_kind = "ac"')
        text = replace_line("line_max", 'line_max = "40 V"')(text)
        text = replace_line("line_values", 'line_values = ["40 V"]')(text)
        return (
            text.replace("# line_frequency", "line_frequency")
            .replace("# source_min_frequency", "source_min_frequency")
            .replace("# source_max_frequency", "source_max_frequency")
        )

    error = problems_of(edited(TEMPLATE, tmp_path, ac_line))
    assert "the line can reach 40 V AC rms (grid.line_values)" in str(error)
    assert "30 V AC rms limit" in str(error)

    # A further node rated above ES1 trips it on its own.
    def secondary(text: str) -> str:
        return low_voltage(text) + (
            '\n[[nodes]]\nname = "secondary"\nchannel = 2\nvolts_per_div = "20 V"\n'
            'probe_ratio = 10\nrating = "100 V"\npolarity = "falling"\n'
        )

    error = problems_of(edited(TEMPLATE, tmp_path, secondary))
    assert "node 'secondary' can reach 100 V peak (nodes[0].rating)" in str(error)


def test_sim_bench_needs_no_acknowledgement() -> None:
    # The DC demo reaches 75 V DC, above ES1, on the simulated bench: allowed.
    assert max(load_sequence(DEMO_DC).grid.line_values_v) > 60.0


def test_visa_resources_checked(tmp_path: Path) -> None:
    bad_load = replace_line("load", 'load = "192.168.1.22"')
    path = edited(TEMPLATE, tmp_path, lambda text: bad_load(acknowledged(text)))
    error = problems_of(path)
    assert [p.key for p in error.problems] == ["bench.resources.load"]
    assert "VISA resource string" in str(error)


def test_missing_file_and_non_utf8(tmp_path: Path) -> None:
    problems_of(tmp_path / "absent.toml")
    binary = tmp_path / "binary.toml"
    binary.write_bytes(b"name = \xff\xfe\n")
    assert "UTF-8" in str(problems_of(binary))


def test_sim_dut_path_relative_to_sequence_file(tmp_path: Path) -> None:
    dut_text = ROOT / "sim_instruments" / "duts" / "telecom_dc_flyback.toml"
    (tmp_path / "duts").mkdir()
    (tmp_path / "duts" / "mine.toml").write_text(dut_text.read_text())
    path = edited(DEMO_DC, tmp_path, replace_line("dut", 'dut = "duts/mine.toml"'))
    assert load_sequence(path).bench.settings.dut_path == tmp_path / "duts" / "mine.toml"


def test_parse_sequence_without_file_hashes_text() -> None:
    text = DEMO_DC.read_text(encoding="utf-8")
    sequence = parse_sequence(text, DEMO_DC)
    assert sequence.sha256 == hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------- through the CLI


def test_cli_check_lists_points() -> None:
    code, out, err = run_cli("check", str(DEMO_DC))
    assert code == 0, err
    assert "16 points" in out
    assert re.search(r"^\s+1\s+36 V DC\s+550 mA$", out, re.MULTILINE)
    assert re.search(r"^\s+16\s+75 V DC\s+2\.2 A$", out, re.MULTILINE)


def test_cli_check_bad_file_exit_2(tmp_path: Path) -> None:
    path = edited(DEMO_DC, tmp_path, replace_line("settle", 'setle = "50 ms"'))
    code, out, err = run_cli("check", str(path))
    assert code == 2
    assert "grid.setle" in err and "did you mean 'settle'" in err and str(path) in err
    assert "Traceback" not in err + out


def test_a_key_ending_in_a_bracket_is_located_without_looping() -> None:
    # A problem key such as "commands.x[" (a fuzzed command map's) once never got shorter while
    # its line was looked up, and `check` spun for good; it is found at its parent's line.
    assert find_key_line("[commands]\nx = 1\n", "commands.x[") == 2
    assert find_key_line("a = 1\n", "b[c") is None
