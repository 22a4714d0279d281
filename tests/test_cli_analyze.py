"""``labseq analyze`` and ``labseq design`` end to end: files, JSON, tables, errors, exit codes."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from labseq.cli import group, main
from labseq.errors import InputError

PROJECT = Path(__file__).resolve().parents[1]
FS, F_RING, ZETA = 2e9, 18e6, 0.06
PRE, PLATEAU, OVERSHOOT = 400, 300.0, 60.0


def synthetic_ring() -> tuple[np.ndarray, np.ndarray]:
    """A 0 → 300 V step at sample 400 followed by an 18 MHz ring with ζ = 0.06 (closed form)."""
    t = (np.arange(6000) - PRE) / FS
    wd = 2 * math.pi * F_RING
    sigma = ZETA * wd / math.sqrt(1 - ZETA**2)
    tc = np.clip(t, 0, None)
    v = np.where(
        t < 0, 0.0, PLATEAU + OVERSHOOT * np.exp(-sigma * tc) * np.sin(wd * tc + math.pi / 2)
    )
    return t, v


def write(tmp_path: Path, kind: str) -> Path:
    t, v = synthetic_ring()
    path = tmp_path / f"ring.{kind.split('-')[0]}"
    if kind == "csv":
        path.write_text(
            "time_s,volts\n" + "\n".join(f"{a:.12g},{b:.9g}" for a, b in zip(t, v, strict=True))
        )
    elif kind == "csv-headerless":
        path.write_text("\n".join(f"{a:.12g},{b:.9g}" for a, b in zip(t, v, strict=True)))
    elif kind == "npy":
        np.save(path, np.c_[t, v])
    elif kind == "npy-structured":
        np.save(path, np.rec.fromarrays([t, v], names="time_s,volts"))
    else:
        np.savez(path, time_s=t, volts=v)
    return path


def run_main(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str]:
    """Run the console entry point in-process; return its exit status and stderr."""
    try:
        main(list(args))
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    return code, capsys.readouterr().err


def test_console_entry_point_in_a_fresh_process(tmp_path: Path) -> None:
    path = tmp_path / "empty.csv"
    path.write_text("")
    env = {**os.environ, "PYTHONPATH": str(PROJECT)}
    env.pop("LABSEQ_DEBUG", None)
    result = subprocess.run(
        [sys.executable, "-c", "from labseq.cli import main; main()", "analyze", str(path)],
        capture_output=True,
        text=True,
        env=env,
        cwd=PROJECT,
        check=False,
    )
    assert result.returncode == 2
    assert str(path) in result.stderr and "Traceback" not in result.stderr


@pytest.mark.parametrize("kind", ["csv", "csv-headerless", "npy", "npy-structured", "npz"])
def test_analyze_json_from_every_file_kind(tmp_path: Path, kind: str) -> None:
    path = write(tmp_path, kind)
    result = CliRunner().invoke(group, ["analyze", str(path), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    for key in (
        "plateau_v",
        "base_v",
        "peak_v",
        "overshoot_v",
        "overshoot_pct",
        "ring_frequency_hz",
        "damping_ratio",
        "q_factor",
        "settling_time_s",
        "edge_time_s",
        "edges",
    ):
        assert key in data
    assert len(data["edges"]) == 1
    # The closed-form ring: plateau 300 V, peak 360 V at the step (cos starts at its maximum).
    assert data["plateau_v"] == pytest.approx(PLATEAU, abs=0.05)
    assert data["base_v"] == pytest.approx(0.0, abs=0.05)
    assert data["peak_v"] == pytest.approx(PLATEAU + OVERSHOOT, abs=0.01)
    assert data["overshoot_pct"] == pytest.approx(100 * OVERSHOOT / PLATEAU, abs=0.05)
    assert data["ring_frequency_hz"] == pytest.approx(F_RING, rel=1e-4)
    assert data["damping_ratio"] == pytest.approx(ZETA, rel=1e-3)
    assert data["edge_time_s"] == pytest.approx(0.0, abs=1 / FS)  # the step is at t = 0


def test_analyze_table_and_plot(tmp_path: Path) -> None:
    path = write(tmp_path, "npz")
    png = tmp_path / "ring.png"
    result = CliRunner().invoke(
        group,
        [
            "analyze",
            str(path),
            "--plot",
            str(png),
            "--rating",
            "600V",
            "--fsw",
            "100kHz",
            "--cs",
            "1n",
            "--rs",
            "22",
        ],
    )
    assert result.exit_code == 0, result.output
    assert "18 MHz" in result.output and "ring_frequency_hz" in result.output
    assert "(Cs·V²·fsw)" in result.output  # a 3 µs record is shorter than a 10 µs period
    assert "probe is across the whole branch" in " ".join(result.output.split())  # assumptions
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("", "empty"),
        ("time_s,volts\n", "no data rows"),
        ("current,voltage\n0,1\n", "no time column among the names on line 1"),
        ("time_s,volts\n" + "\n".join(f"{k}e-9,{k % 7}" for k in range(20)), "at least"),
        (
            "time_s,volts\n" + "\n".join(f"{k}e-9,{'nan' if k == 50 else k}" for k in range(100)),
            "non-finite",
        ),
        (
            "time_s,volts\n" + "\n".join(f"{(k if k != 40 else 38)}e-9,{k}" for k in range(100)),
            "does not increase",
        ),
        (
            "time_s,volts\n" + "\n".join(f"{k * (1 + (k > 50))}e-9,{k}" for k in range(100)),
            "not uniformly",
        ),
        (
            "time_s,volts\n" + "\n".join(f"{k}e-9,{100 - k}" for k in range(100)),
            "no rising turn-off edge",
        ),
    ],
)
def test_bad_files_exit_2_naming_the_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], content: str, message: str
) -> None:
    path = tmp_path / "bad.csv"
    path.write_text(content)
    code, stderr = run_main(capsys, "analyze", str(path), "--json")
    assert code == 2, stderr
    assert str(path) in stderr and message in stderr
    assert "Traceback" not in stderr


def test_wrong_arrays_and_options_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    npz = tmp_path / "wrong.npz"
    np.savez(npz, t=np.arange(100.0), v=np.arange(100.0))
    code, stderr = run_main(capsys, "analyze", str(npz))
    assert code == 2 and "expected ['time_s', 'volts']" in stderr and str(npz) in stderr
    ring = write(tmp_path, "npz")
    code, stderr = run_main(capsys, "analyze", str(ring), "--fsw", "100kHz")
    assert code == 2 and "--fsw, --cs and --rs go together" in stderr
    code, stderr = run_main(capsys, "analyze", str(ring), "--rating", "25MHz")
    assert code == 2 and "expected V" in stderr


def test_design_text_and_json() -> None:
    runner = CliRunner()
    args = [
        "design",
        "--ring-freq",
        "25MHz",
        "--leakage",
        "200n",
        "--volts",
        "400",
        "--fsw",
        "100kHz",
    ]
    text = runner.invoke(group, [*args, "--cs", "680p"])
    assert text.exit_code == 0, text.output
    # 25 MHz with 200 nH gives R ≈ 31.4 Ω (common practice, no published source).
    assert "31.4 Ω" in text.output and "680 pF" in text.output
    data = json.loads(runner.invoke(group, [*args, "--loss-budget", "0.5W", "--json"]).output)
    for key in ("c_par_f", "l_leak_h", "r_ohm", "cs_f", "loss_w"):
        assert key in data
    # Severns: Cs = P/(V²·fsw) and Cpar = 1/((2πf)²·L).
    assert data["cs_f"] == pytest.approx(0.5 / (400**2 * 100e3))
    assert data["c_par_f"] == pytest.approx(1 / ((2 * math.pi * 25e6) ** 2 * 200e-9))
    # a ring frequency alone sizes nothing: a clear error, never a table or object of blanks
    alone = runner.invoke(group, ["design", "--ring-freq", "25MHz", "--json"])
    assert isinstance(alone.exception, InputError) and alone.output == ""
    assert "a ring frequency alone cannot size a snubber" in str(alone.exception)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (
            ["--ring-freq", "20MHz", "--added-cap", "100p", "--ring-freq-added", "25MHz"],
            "--ring-freq-added",
        ),
        (["--ring-freq", "20MHz", "--added-cap", "100p"], "go together"),
        (["--ring-freq", "20MHz", "--leakage", "-200n"], "--leakage must be a positive"),
        (
            ["--ring-freq", "20MHz", "--leakage", "200n", "--loss-budget", "1W"],
            "need --volts and --fsw",
        ),
        (["--ring-freq", "20 V"], "expected Hz"),
    ],
)
def test_design_invalid_combinations_exit_2(
    capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    code, stderr = run_main(capsys, "design", *args)
    assert code == 2, stderr
    assert message in stderr and "Traceback" not in stderr


def test_design_sizes_an_rcd_clamp_and_names_the_cheaper_tool() -> None:
    runner = CliRunner()
    clamp = ["--clamp-voltage", "60V", "--peak-current", "2A", "--reflected-voltage", "25V"]
    rc = ["--ring-freq", "25MHz", "--leakage", "250n", "--volts", "100V", "--fsw", "200kHz"]
    data = json.loads(runner.invoke(group, ["design", *rc, *clamp, "--json"]).output)
    # Fairchild AN-4147 (from memory): P = ½·Llk·Ipk²·fsw·Vc/(Vc − Vr), R = Vc²/P,
    # C = Vc/(ΔV·R·fsw); the default ripple is 10 % of Vc.
    loss_w = 0.5 * 250e-9 * 2.0**2 * 200e3 * 60 / (60 - 25)
    assert data["clamp_loss_w"] == pytest.approx(loss_w)
    assert data["clamp_r_ohm"] == pytest.approx(60**2 / loss_w)
    assert data["clamp_c_f"] == pytest.approx(60 / (6.0 * 60**2 / loss_w * 200e3))
    # RC damper: Cs = 3 × Cpar dissipates Cs·V²·fsw ≈ 0.97 W, more than the clamp's 0.17 W.
    assert data["loss_w"] > data["clamp_loss_w"] and data["cheaper_tool"] == "rcd clamp"
    text = runner.invoke(group, ["design", *rc, *clamp, "--clamp-ripple", "3V"])
    assert text.exit_code == 0, text.output
    assert "171 mW" in text.output and "the RCD clamp is the cheaper tool" in text.output
    # A small chosen Cs at a low step voltage makes the RC damper the cheaper tool.
    cheap_rc = ["--ring-freq", "25MHz", "--leakage", "250n", "--volts", "20V", "--fsw", "200kHz"]
    text = runner.invoke(group, ["design", *cheap_rc, "--cs", "100p", *clamp])
    assert "the RC damper is the cheaper tool" in text.output
    only_clamp = json.loads(
        runner.invoke(
            group, ["design", "--leakage", "250n", "--fsw", "200kHz", *clamp, "--json"]
        ).output
    )
    assert only_clamp["clamp_loss_w"] == pytest.approx(loss_w) and only_clamp["r_ohm"] is None


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--clamp-voltage", "20V"], "--clamp-voltage (20 V) must be above --reflected-voltage"),
        (["--clamp-voltage", "60V", "--clamp-ripple", "80V"], "--clamp-ripple (80 V) must be"),
        (["--clamp-voltage", "60 A"], "expected V"),
    ],
)
def test_design_clamp_errors_exit_2(
    capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    base = ["--leakage", "250n", "--fsw", "200kHz", "--peak-current", "2A"]
    code, stderr = run_main(capsys, "design", *base, "--reflected-voltage", "25V", *args)
    assert code == 2, stderr
    assert message in stderr and "Traceback" not in stderr
    code, stderr = run_main(capsys, "design", "--clamp-voltage", "60V")
    assert code == 2 and "needs --leakage, --peak-current, --fsw, --reflected-voltage" in stderr


def test_absurd_volts_are_refused_with_the_row(tmp_path: Path, capsys) -> None:
    t, v = synthetic_ring()
    v = v.copy()
    v[10] = 3e9  # a column in millivolts, or a corrupt row
    path = tmp_path / "mv.csv"
    np.savetxt(path, np.column_stack([t, v]), delimiter=",", header="time_s,volts", comments="")
    code, err = run_main(capsys, "analyze", str(path))
    assert code == 2
    # Sample 11 is on line 12, under the header.
    assert "line 12" in err and str(path) in err and "Traceback" not in err


def test_design_from_a_ring_measured_with_the_damper_fitted() -> None:
    l_h, c_f, rs, cs = 250e-9, 230e-12, 33.0, 470e-12
    state = np.array(
        [
            [0.0, -1 / l_h, 0.0],
            [1 / c_f, -1 / (rs * c_f), 1 / (rs * c_f)],
            [0.0, 1 / (rs * cs), -1 / (rs * cs)],
        ]
    )
    eig = np.linalg.eigvals(state)
    pole = eig[eig.imag > 0][0]
    ring_hz, zeta = pole.imag / (2 * math.pi), -pole.real / abs(pole)
    args = ["design", "--ring-freq", f"{ring_hz:.9g}", "--damping", f"{zeta:.9g}"]
    args += ["--snubber-r", "33", "--snubber-c", "470p"]
    result = CliRunner().invoke(group, [*args, "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    # The network's state-matrix eigenvalues (numpy) are the truth: the characteristic equation
    # gives back its L and Cpar.
    assert data["l_leak_h"] == pytest.approx(l_h, rel=1e-6)
    assert data["c_par_f"] == pytest.approx(c_f, rel=1e-6)
    assert data["network_from"] == "loaded ring"
    text = CliRunner().invoke(group, args).output
    assert "250 nH" in text and "230 pF" in text and "fitted damper" in text


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--damping", "0.3", "--snubber-r", "33"], "go together"),
        (
            ["--damping", "0.3", "--snubber-r", "33", "--snubber-c", "470p", "--leakage", "250n"],
            "give one way",
        ),  # fmt: skip
        (["--damping", "1.2", "--snubber-r", "33", "--snubber-c", "470p"], "below 1"),
        (["--damping", "lots", "--snubber-r", "33", "--snubber-c", "470p"], "--damping 'lots'"),
        (["--damping", "0.3", "--snubber-r", "33 F", "--snubber-c", "470p"], "expected Ω"),
    ],
)
def test_design_loaded_ring_errors_exit_2(
    capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    code, stderr = run_main(capsys, "design", "--ring-freq", "15MHz", *args)
    assert code == 2, stderr
    assert message in stderr and "Traceback" not in stderr


def test_design_rc_loss_beside_a_clamp_includes_the_leakage_energy() -> None:
    clamp = ["--clamp-voltage", "60V", "--peak-current", "2A", "--reflected-voltage", "25V"]
    rc = ["--ring-freq", "25MHz", "--leakage", "250n", "--volts", "20V", "--fsw", "200kHz"]
    data = json.loads(
        CliRunner().invoke(group, ["design", *rc, "--cs", "100p", *clamp, "--json"]).output
    )
    # The damper's resistor takes Cs·V²·fsw (Severns) and the leakage energy ½·L·Ipk²·fsw.
    leakage_w = 0.5 * 250e-9 * 2.0**2 * 200e3
    assert data["rc_loss_with_leakage_w"] == pytest.approx(data["loss_w"] + leakage_w)
    text = CliRunner().invoke(group, ["design", *rc, "--cs", "100p", *clamp]).output
    assert "leakage energy ½·L·Ipk²·fsw" in text and "RCD clamp energy balance" in text
    assert "AN-4147" not in text and "Fairchild" not in text


def test_analyze_says_no_ring_for_a_node_that_settles_without_ringing(tmp_path: Path) -> None:
    # An overdamped turn-off: a ramp to the 250 V plateau, then two real poles (40 ns and 8 ns)
    # lift the node by a single bump and let it settle, with no oscillation at all.
    t = np.arange(-200, 2800) * 1e-9
    rise = np.clip(t / 20e-9, 0.0, 1.0) * 250.0
    tau = np.maximum(t - 20e-9, 0.0)
    tail = 60 * (np.exp(-tau / 40e-9) - np.exp(-tau / 8e-9))
    path = tmp_path / "overdamped.npz"
    np.savez(path, time_s=t, volts=rise + tail)
    result = CliRunner().invoke(group, ["analyze", str(path), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    # The closed form has no complex pair: no ζ or frequency, the slower real pole's decay.
    assert data["ring_model"] == "no ring" and data["damping_ratio"] is None
    assert data["ring_frequency_hz"] is None
    assert data["real_pole_decay_rate_per_s"] == pytest.approx(1 / 40e-9, rel=0.02)
    table = CliRunner().invoke(group, ["analyze", str(path)]).output
    assert "no ring" in table
