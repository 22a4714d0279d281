"""DUT files: the demo files load, and every fault names the file, the key and what is valid."""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path

import pytest

from labseq_sim_instruments.flyback import DEMO_DUTS, DutFileError, load_dut, resolve_dut

TELECOM_TEXT = DEMO_DUTS["telecom_dc"].read_text(encoding="utf-8")


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "dut.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_demo_duts_load_with_si_values() -> None:
    telecom = load_dut(resolve_dut("telecom_dc"))
    assert telecom.line_kind == "dc"
    assert (telecom.line_min_v, telecom.line_max_v) == (36.0, 75.0)
    assert telecom.line_frequency_hz == 0.0
    assert telecom.leakage_inductance_h == pytest.approx(250e-9)  # written "250nH"
    assert telecom.snubber_capacitance_f == pytest.approx(220e-12)  # written "220pF"
    assert telecom.clamp_voltage_v is None and not telecom.has_clamp
    offline = load_dut(resolve_dut("offline_ac"))
    assert offline.line_kind == "ac" and offline.line_frequency_hz == 50.0
    assert offline.has_clamp
    assert offline.clamp_resistance_ohm == pytest.approx(47e3)  # written "47kohm"
    assert offline.switch_rating_v == 650.0


def test_demo_duts_match_their_briefed_classes() -> None:
    # The demo scenarios' ranges: telecom 36-75 V DC, 150 V-class switch, 25-40 W; offline
    # universal 90-264 V rms, 650-800 V switch, 30-65 W, with an RCD clamp.
    telecom, offline = load_dut(DEMO_DUTS["telecom_dc"]), load_dut(DEMO_DUTS["offline_ac"])
    assert 25.0 <= telecom.output_voltage_v * telecom.rated_load_a <= 40.0
    assert 150.0 <= telecom.switch_rating_v < 200.0
    assert 30.0 <= offline.output_voltage_v * offline.rated_load_a <= 65.0
    assert 650.0 <= offline.switch_rating_v <= 800.0
    for design in (telecom, offline):
        # ring frequency f = 1/(2π·sqrt(Llk·C)) of a few MHz to a few tens of MHz
        c_f = design.coss_f(design.line_max_v) + design.stray_capacitance_f
        ring_hz = 1.0 / (2 * math.pi * math.sqrt(design.leakage_inductance_h * c_f))
        assert 2e6 < ring_hz < 50e6


def test_resolve_dut_accepts_demo_names_and_paths(tmp_path: Path) -> None:
    assert resolve_dut("offline_ac") == DEMO_DUTS["offline_ac"]
    path = write(tmp_path, TELECOM_TEXT)
    assert resolve_dut(str(path)) == path
    with pytest.raises(DutFileError, match=r"'nope'.*offline_ac, telecom_dc"):
        resolve_dut("nope")


def test_with_snubber_changes_only_the_damper() -> None:
    telecom = load_dut(DEMO_DUTS["telecom_dc"])
    other = telecom.with_snubber(47.0, 680e-12)
    assert (other.snubber_resistance_ohm, other.snubber_capacitance_f) == (47.0, 680e-12)
    assert other.leakage_inductance_h == telecom.leakage_inductance_h
    assert not telecom.with_snubber(0.0, 0.0).has_snubber
    with pytest.raises(DutFileError, match="resistance"):
        telecom.with_snubber(0.0, 1e-9)


@pytest.mark.parametrize(
    ("old", "new", "pattern"),
    [
        # unknown key, with the closest valid spelling
        (
            "leakage_inductance =",
            "leakage_inductanse =",
            r"transformer\.leakage_inductanse: unknown key; did you mean 'leakage_inductance'",
        ),
        # unknown table
        ("[snubber]", "[snubbers]", r"snubbers: unknown key; did you mean 'snubber'"),
        # missing key
        ('rated_load = "2.2 A"\n', "", r"output\.rated_load: missing; give a quantity in A"),
        # wrong type
        ("turns_ratio = 2.0", "turns_ratio = true", r"transformer\.turns_ratio: .*boolean"),
        ('rating = "150 V"', "rating = [150]", r"switch\.rating: .*expected a number"),
        # bad unit
        ('rating = "150 V"', 'rating = "150 A"', r"switch\.rating: .*in A, expected V"),
        ('frequency = "200kHz"', 'frequency = "200 kHzz"', r"switch\.frequency: .*cannot read"),
        # non-positive values
        (
            'leakage_inductance = "250nH"',
            'leakage_inductance = "0 H"',
            r"transformer\.leakage_inductance: .*> 0",
        ),
        (
            'magnetizing_inductance = "80uH"',
            'magnetizing_inductance = "-80uH"',
            r"magnetizing_inductance.*> 0",
        ),
        (
            "other_loss_fraction = 0.08",
            "other_loss_fraction = 1.5",
            r"other_loss_fraction.*fraction",
        ),
        # inconsistent values
        (
            'kind = "dc"',
            'kind = "ac"',
            r"line\.frequency: missing; an AC line needs 50 Hz or 60 Hz",
        ),
        (
            'kind = "dc"',
            'kind = "mains"',
            r"line\.kind: 'mains' is not valid; expected 'dc' or 'ac'",
        ),
        ('max = "75 V"', 'max = "30 V"', r"line\.max: .* below min"),
        (
            'resistance = "100 ohm"',
            'resistance = "0 ohm"',
            r"snubber\.resistance: 0 is not valid.*capacitance = 0",
        ),
        (
            'label = "Telecom 36-75 V DC flyback, 12 V 2.2 A (demo)"',
            'label = "  "',
            r"label: must be a non-empty text",
        ),
        (
            'coss_c0 = "800pF"                # Coss(V) = C0 / sqrt(1 + V/Vj)\ncoss_vj = "5 V"\n'
            'stray_capacitance = "40pF"',
            'coss_c0 = 0\ncoss_vj = "5 V"\nstray_capacitance = "0 F"',
            r"switch\.coss_c0: coss_c0 and stray_capacitance are both 0",
        ),
    ],
)
def test_dut_file_errors_name_file_and_key(
    tmp_path: Path, old: str, new: str, pattern: str
) -> None:
    assert old in TELECOM_TEXT
    path = write(tmp_path, TELECOM_TEXT.replace(old, new, 1))
    with pytest.raises(DutFileError, match=pattern) as caught:
        load_dut(path)
    assert str(path) in str(caught.value) and re.search(r"\n  line \d+, ", str(caught.value))


def test_ac_line_frequency_must_be_mains(tmp_path: Path) -> None:
    text = DEMO_DUTS["offline_ac"].read_text(encoding="utf-8").replace('"50 Hz"', '"400 Hz"')
    with pytest.raises(DutFileError, match=r"line\.frequency: .*50 Hz or 60 Hz"):
        load_dut(write(tmp_path, text))


def test_missing_table_and_bad_toml_and_missing_file(tmp_path: Path) -> None:
    data = tomllib.loads(TELECOM_TEXT)
    assert "losses" in data
    without = TELECOM_TEXT.split("[losses]")[0] + "[snubber]" + TELECOM_TEXT.split("[snubber]")[1]
    with pytest.raises(
        DutFileError, match=r"losses: missing; the DUT file needs a \[losses\] table"
    ):
        load_dut(write(tmp_path, without))
    with pytest.raises(DutFileError, match="not valid TOML"):
        load_dut(write(tmp_path, "label = \n"))
    with pytest.raises(DutFileError, match="no such DUT file"):
        load_dut(tmp_path / "absent.toml")


def test_optional_clamp_table_is_checked_when_present(tmp_path: Path) -> None:
    text = TELECOM_TEXT + '\n[clamp]\nvoltage = "60 V"\nresistance = "10kohm"\n'
    with pytest.raises(DutFileError, match=r"clamp\.capacitance: missing"):
        load_dut(write(tmp_path, text))
    design = load_dut(write(tmp_path, text + 'capacitance = "2.2nF"\n'))
    assert design.clamp_voltage_v == 60.0 and design.clamp_capacitance_f == pytest.approx(2.2e-9)


def test_demo_rectifiers_match_their_briefed_classes() -> None:
    # The demo scenarios: telecom with a 60-100 V Schottky, offline with a 150-200 V
    # fast-recovery pn diode and an RC damper across it.
    telecom, offline = load_dut(DEMO_DUTS["telecom_dc"]), load_dut(DEMO_DUTS["offline_ac"])
    assert telecom.secondary.kind == "schottky" and telecom.secondary.carrier_lifetime_s == 0.0
    assert 60.0 <= telecom.secondary.reverse_rating_v <= 100.0
    assert offline.secondary.kind == "pn" and offline.secondary.has_snubber
    assert 150.0 <= offline.secondary.reverse_rating_v <= 200.0
    assert offline.secondary.carrier_lifetime_s == pytest.approx(20e-9)  # written "20ns"
    assert offline.secondary.snubber_capacitance_f == pytest.approx(470e-12)  # written "470pF"
    for design in (telecom, offline):
        # reverse plateau Vin/n + Vout at high line under the rating (flyback relation, Erickson
        # & Maksimović, Fundamentals of Power Electronics, flyback chapter)
        peak_bus_v = design.line_max_v * (math.sqrt(2) if design.line_kind == "ac" else 1.0)
        plateau_v = peak_bus_v / design.turns_ratio + design.output_voltage_v
        assert plateau_v < design.secondary.reverse_rating_v


def test_secondary_table_is_optional(tmp_path: Path) -> None:
    without = TELECOM_TEXT.split("\n[secondary]")[0] + "\n"
    assert load_dut(write(tmp_path, without)).secondary is None


@pytest.mark.parametrize(
    ("old", "new", "pattern"),
    [
        (
            'kind = "schottky"',
            'kind = "zener"',
            r"secondary\.kind: 'zener' is not valid; expected 'schottky' or 'pn'",
        ),
        ('kind = "schottky"', 'kind = "pn"', r"secondary\.carrier_lifetime: missing"),
        (
            'reverse_rating = "100 V"',
            'reverse_rating = "100 V"\ncarrier_lifetime = "20ns"',
            r"secondary\.carrier_lifetime: for kind = 'pn' only",
        ),
        (
            'series_resistance = "30mohm"',
            'series_resistance = "30mohm"\nsnubber_capacitance = "1nF"',
            r"secondary\.snubber_resistance: 0 is not valid.*snubber_capacitance = 0",
        ),
        (
            'junction_capacitance = "250pF"',
            'junction_capacitence = "250pF"',
            r"secondary\.junction_capacitence: unknown key; did you mean 'junction_capacitance'",
        ),
        ('reverse_rating = "100 V"', 'reverse_rating = "100 A"', r"reverse_rating.*expected V"),
        ('loop_inductance = "10nH"', 'loop_inductance = "-1nH"', r"loop_inductance.*≥ 0"),
    ],
)
def test_secondary_table_errors_name_file_and_key(
    tmp_path: Path, old: str, new: str, pattern: str
) -> None:
    assert old in TELECOM_TEXT
    path = write(tmp_path, TELECOM_TEXT.replace(old, new, 1))
    with pytest.raises(DutFileError, match=pattern) as caught:
        load_dut(path)
    assert str(path) in str(caught.value) and re.search(r"\n  line \d+, ", str(caught.value))


def test_every_problem_of_a_dut_file_is_reported_at_once(tmp_path: Path) -> None:
    text = TELECOM_TEXT.replace('rating = "150 V"', 'rating = "150 A"', 1)
    text = text.replace("leakage_inductance =", "leakage_inductanse =", 1)
    path = write(tmp_path, text)
    with pytest.raises(DutFileError) as caught:
        load_dut(path)
    message = str(caught.value)
    assert message.startswith(f"{path}: 3 problems:")  # the misspelt key is also missing
    assert "switch.rating: " in message and "transformer.leakage_inductanse: unknown key" in message
    assert "transformer.leakage_inductance: missing" in message
