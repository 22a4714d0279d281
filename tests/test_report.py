"""``labseq report``: the files exist, the HTML is well formed with its sections in reading order,
the images decode, the worst point it names is the worst in the store, user text is escaped, and
the run verdict follows the rule (fail if any point fails, else incomplete if any is)."""

from __future__ import annotations

import base64
import csv
import io
import json
import re
import sqlite3
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from sweeps import run_cli

from labseq.analysis.verdict import worst_verdict
from labseq.review import review_run
from labseq.store import CaptureRecord, PointReadings, Store
from labseq.units import format_si

ROOT = Path(__file__).resolve().parent.parent
DEMO_SEQUENCE = ROOT / "labseq" / "examples" / "demo_dc_flyback.toml"
LINES_V = (36.0, 48.0, 60.0, 75.0)
LOADS_A = (0.55, 1.1, 1.65, 2.2)
#: The demo sequence's limit: switch rating 150 V × derating 0.8.
MAX_PEAK_V = 120.0
REPORT_SECTIONS = ("verdict", "grid", "maps", "worst", "identity", "sequence", "safety")


# --------------------------------------------------------------------------- synthetic runs


class Ringing:
    """A synthetic switch-node record as a scope sends it: int8 codes and their scaling.

    Off at 0 V, then at t = 0 a step to ``plateau_v`` with a decaying ring on top."""

    def __init__(self, plateau_v: float, ring_v: float, damping: float, seed: int) -> None:
        rng = np.random.default_rng(seed)
        self.x_increment_s = 1e-9
        self.x_origin_s = -0.5e-6
        t_s = self.x_origin_s + np.arange(2500) * self.x_increment_s
        omega = 2 * np.pi * 20e6
        ring = ring_v * np.exp(-damping * omega * t_s) * np.sin(omega * t_s)
        volts = np.where(t_s < 0, 0.0, plateau_v + ring) + rng.normal(0, 0.3, t_s.size)
        self.y_increment_v, self.y_origin_v, self.y_reference = 250.0 / 256, 100.0, 0.0
        codes = np.round((volts - self.y_origin_v) / self.y_increment_v)
        self.codes = np.clip(codes, -128, 127).astype(np.int8)
        self.code_min, self.code_max = -128, 127


def point_figures(line_v: float, load_a: float, peak_scale: float, damping: float) -> dict:
    """Per-point figures of a synthetic snubber: peak grows with line and load."""
    plateau_v = line_v + 25.0
    peak_v = plateau_v + 20.0 * load_a * peak_scale
    figures = {
        "peak_v": (peak_v, 0.5),
        "stress_margin_v": (MAX_PEAK_V - peak_v, 0.5),
        "overshoot_v": (peak_v - plateau_v, 0.5),
        "damping_ratio": (damping - 0.01 * load_a, 0.004),
        "q_factor": (0.5 / (damping - 0.01 * load_a), 0.02),
        "settling_time_s": (30e-9 / (damping - 0.01 * load_a), 2e-9),
        "snubber_loss_w": (2e-3 * plateau_v / peak_scale, 1e-3),
    }
    return {
        name: {"worst": worst, "mean": worst, "spread": spread, "n": 3}
        for name, (worst, spread) in figures.items()
    }


def make_run(
    store: Store,
    *,
    peak_scale: float = 1.0,
    damping: float = 0.3,
    snubber_label: str = "RC 47 ohm / 470 pF",
    notes: str = "",
    sequence_text: str | None = None,
    skip: tuple[tuple[float, float], ...] = (),
    shift: float = 1.0,
    worse_at: tuple[float, float] | None = None,
    captures: int = 2,
    incomplete_at: tuple[float, float] | None = None,
) -> int:
    """A finished run on the 4 × 4 demo grid with stored figures, verdicts and a few captures.

    ``skip`` leaves points out, ``shift`` scales every line setpoint, ``worse_at`` raises the peak
    of one point by 60 V, ``incomplete_at`` marks one point incomplete."""
    text = DEMO_SEQUENCE.read_text(encoding="utf-8") if sequence_text is None else sequence_text
    run_id = store.create_run(
        sequence_text=text,
        sequence_sha256="0" * 64,
        sequence_path=str(DEMO_SEQUENCE),
        dut_label="Telecom 36-75 V DC flyback, 12 V 2.2 A",
        snubber_label=snubber_label,
        bench_kind="sim",
        instruments={"scope": "LABSEQ,SIM-SCOPE,0,0.1.0"},
        notes=notes,
    )
    grid = [(v, a) for v in LINES_V for a in LOADS_A if (v, a) not in skip]
    ids = store.add_points(run_id, [(v * shift, a) for v, a in grid], line_is_ac=False)
    for index, (point_id, (line_v, load_a)) in enumerate(zip(ids, grid, strict=True)):
        figures = point_figures(line_v, load_a, peak_scale, damping)
        if (line_v, load_a) == worse_at:
            figures["peak_v"]["worst"] += 60.0
        records = [
            CaptureRecord(
                Ringing(line_v + 25, 20 * load_a * peak_scale, damping, index * 7 + k),
                node="primary",
            )
            for k in range(captures)
        ]
        efficiency = 0.9 - 0.01 * load_a
        store.commit_point(
            point_id, captures=records, readings=PointReadings(efficiency=efficiency)
        )
        peak_v = figures["peak_v"]["worst"]
        if (line_v, load_a) == incomplete_at:
            verdict, reasons = "incomplete", ["damping_ratio: not determined"]
        elif peak_v > MAX_PEAK_V:
            verdict, reasons = "fail", [f"peak_v {format_si(peak_v, 'V')} breaks limit ≤ 120 V"]
        else:
            verdict, reasons = "pass", []
        store.set_point_judgement(
            point_id, {"primary": figures}, {"primary": (verdict, reasons)}, verdict, reasons
        )
    store.set_run_status(run_id, "finished")
    return run_id


# --------------------------------------------------------------------------- HTML checks


class PageParser(HTMLParser):
    """Checks that tags balance and collects what the tests look for."""

    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.section_ids: list[str] = []
        self.images: list[str] = []
        self.scripts = 0
        self.rows: list[list[str]] = []
        self._row: list[str] | None = None
        self._cell: list[str] | None = None
        self.current_section = ""
        self.rows_by_section: dict[str, list[list[str]]] = {}

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        attributes = dict(attrs)
        if tag == "script":
            self.scripts += 1
        if tag == "h2" and attributes.get("id"):
            self.section_ids.append(attributes["id"])
            self.current_section = attributes["id"]
        if tag == "img":
            self.images.append(attributes.get("src") or "")
        if tag == "tr":
            self._row = []
        if tag in ("td", "th"):
            self._cell = []
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
            return
        self.stack.pop()
        if tag in ("td", "th") and self._row is not None and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        if tag == "tr" and self._row is not None:
            self.rows_by_section.setdefault(self.current_section, []).append(self._row)
            self._row = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)


def parse_page(path: Path) -> PageParser:
    parser = PageParser()
    parser.feed(path.read_text(encoding="utf-8"))
    parser.close()
    assert parser.errors == [] and parser.stack == [], (parser.errors, parser.stack)
    return parser


def decoded_images(parser: PageParser) -> list[bytes]:
    """The PNG bytes of every embedded image (all must be data URIs: the page is offline)."""
    found = []
    for src in parser.images:
        assert src.startswith("data:image/png;base64,"), src[:40]
        found.append(base64.b64decode(src.removeprefix("data:image/png;base64,")))
    return found


# --------------------------------------------------------------------------- tests


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "store.sqlite"


def test_report_files_sections_and_images(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
    out = tmp_path / "report"
    code, stdout, stderr = run_cli("report", str(run_id), "--db", str(db), "--out", str(out))
    assert code == 0, stderr
    assert "report written" in stdout
    html_path = out / "report.html"
    assert html_path.is_file() and (out / "points.csv").is_file()
    parser = parse_page(html_path)
    # Sections present, in the order a reviewer reads them.
    positions = [parser.section_ids.index(name) for name in REPORT_SECTIONS]
    assert positions == sorted(positions)
    assert parser.scripts == 0
    images = decoded_images(parser)
    on_disk = sorted(out.glob("*.png"))
    assert len(images) == len(on_disk) >= 6  # five maps and at least one overlay
    for png in images:
        # PNG signature (ISO/IEC 15948, 5.2) and a decodable image with real pixels.
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
        pixels = matplotlib.image.imread(io.BytesIO(png), format="png")
        assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100
        assert np.ptp(pixels[..., :3]) > 0.2  # not a blank canvas
    assert {p.read_bytes() for p in on_disk} == set(images)
    with (out / "points.csv").open(encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == len(LINES_V) * len(LOADS_A)


def test_worst_point_named_is_the_worst_in_the_store(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store, worse_at=(48.0, 1.1))
    out = tmp_path / "report"
    assert run_cli("report", "latest", "--db", str(db), "--out", str(out))[0] == 0
    parser = parse_page(out / "report.html")
    worst_rows = {row[0]: row for row in parser.rows_by_section["worst"] if row}
    connection = sqlite3.connect(db)
    for figure, title, order, text in (
        ("peak_v", "peak stress", "DESC", lambda v: format_si(v, "V")),
        ("damping_ratio", "damping ratio", "ASC", lambda v: f"{v:.3g}"),
        ("snubber_loss_w", "snubber loss", "DESC", lambda v: format_si(v, "W")),
    ):
        line_v, load_a, worst = connection.execute(
            "SELECT p.line_v, p.load_a, f.worst FROM point_figures f JOIN points p "
            f"ON p.id = f.point_id WHERE p.run_id = ? AND f.figure = ? ORDER BY f.worst {order} "
            "LIMIT 1",
            (run_id, figure),
        ).fetchone()
        row = worst_rows[title]
        assert row[2].startswith(f"{format_si(line_v, 'V')} / {format_si(load_a, 'A')}"), row
        assert row[1] == text(worst)
    connection.close()
    # The deliberately worse point is the worst peak, and its overlay is drawn.
    assert worst_rows["peak stress"][2].startswith("48 V / 1.1 A")
    assert "48 V / 1.1 A (50 %) — worst peak stress" in (out / "report.html").read_text("utf-8")


def test_user_text_is_escaped(db: Path, tmp_path: Path) -> None:
    evil = "<script>alert('x')</script>"
    text = DEMO_SEQUENCE.read_text(encoding="utf-8") + f"\n# {evil}\n"
    with Store(db) as store:
        run_id = make_run(store, snubber_label=evil, notes=evil, sequence_text=text)
    out = tmp_path / "report"
    assert run_cli("report", str(run_id), "--db", str(db), "--out", str(out))[0] == 0
    page = (out / "report.html").read_text(encoding="utf-8")
    assert re.search(r"<script", page, re.IGNORECASE) is None
    assert page.count("&lt;script&gt;") >= 3  # label, notes and the sequence text
    assert parse_page(out / "report.html").scripts == 0


def test_run_verdict_rule() -> None:
    # The rule of the run verdict: fail if any point fails; incomplete if any is incomplete and
    # none fails; pass only when every point passes.
    assert worst_verdict(["pass", "pass"]) == "pass"
    assert worst_verdict(["pass", "incomplete"]) == "incomplete"
    assert worst_verdict(["incomplete", "fail", "pass"]) == "fail"
    assert worst_verdict([]) == "incomplete"


def test_report_verdicts_and_json(db: Path) -> None:
    with Store(db) as store:
        passing = make_run(store, peak_scale=0.2)
        failing = make_run(store, peak_scale=1.5, incomplete_at=(36.0, 0.55))
        incomplete = make_run(store, peak_scale=0.2, incomplete_at=(36.0, 0.55))
        expected = {}
        for run_id in (passing, failing, incomplete):
            verdicts = [p.verdict for p in store.points(run_id)]
            expected[run_id] = (
                "fail"
                if "fail" in verdicts
                else "incomplete"
                if "incomplete" in verdicts
                else "pass"
            )
    assert expected == {passing: "pass", failing: "fail", incomplete: "incomplete"}
    for run_id, verdict in expected.items():
        code, stdout, stderr = run_cli("report", str(run_id), "--db", str(db), "--format", "json")
        assert code == 0, stderr
        summary = json.loads(stdout)
        assert summary["verdict"] == verdict
        assert len(summary["points"]) == 16
        assert summary["limits"]["max_peak_v"] == pytest.approx(MAX_PEAK_V)
        worst_peak = max(row["figures"]["peak_v"]["worst"] for row in summary["points"])
        assert summary["worst"]["peak_v"]["value"] == worst_peak


def test_report_of_an_unfinished_run_and_bad_input(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = store.create_run(
            sequence_text="not = [valid",
            sequence_sha256="0" * 64,
            sequence_path="gone.toml",
            dut_label="D",
            snubber_label="S",
            bench_kind="sim",
        )
        store.add_points(run_id, [(36.0, 1.0), (48.0, 1.0)], line_is_ac=False)
        review = review_run(store, run_id)
    assert review.verdict == "incomplete" and review.sequence is None
    out = tmp_path / "pending"
    code, _, stderr = run_cli("report", str(run_id), "--db", str(db), "--out", str(out))
    assert code == 0, stderr
    parse_page(out / "report.html")
    assert "no longer validates" in (out / "report.html").read_text("utf-8")

    code, _, stderr = run_cli("report", "99", "--db", str(db))
    assert code == 2 and "no run 99" in stderr and "Traceback" not in stderr
    code, _, stderr = run_cli("report", "first", "--db", str(db))
    assert code == 2 and "'first'" in stderr and "latest" in stderr
    code, _, stderr = run_cli("report", "1", "--db", str(tmp_path / "missing.sqlite"))
    assert code == 2 and "missing.sqlite" in stderr
