"""The figure catalogue is the one home of every figure's facts: what the analysis produces, the
store keeps, a limit judges and a compare compares is in it, and its facts agree with each
other."""

from __future__ import annotations

from pathlib import Path

import pytest

from labseq.analysis.capture import EDGE_FIGURE_NAMES, ClampFigures
from labseq.analysis.verdict import LIMIT_FIGURES
from labseq.figures import (
    CAPTURE_FIGURES,
    CAPTURE_METHODS,
    FIGURE,
    FIGURE_DIRECTIONS,
    FIGURES,
    HIGHER,
    LOWER,
    NOISE_FLOORS,
    REVIEWED,
    format_change,
    format_figure,
)
from labseq.store import Store


def test_every_figure_the_analysis_gives_is_catalogued() -> None:
    clamp = ClampFigures(200.0, 120.0, "dc-line", 80.0, 0.3).as_dict()
    produced = {*EDGE_FIGURE_NAMES, *clamp} - {"clipped"}
    assert produced <= set(FIGURE)
    assert len(FIGURE) == len(FIGURES)  # one entry per name


def test_the_store_keeps_each_capture_figure_in_its_own_column(tmp_path: Path) -> None:
    with Store(tmp_path / "new.sqlite") as store:
        rows = store.db.execute("PRAGMA table_info(capture_figures)").fetchall()
    columns = {row[1]: row[2] for row in rows}
    assert {name: columns.get(name) for name in CAPTURE_FIGURES} == dict.fromkeys(
        CAPTURE_FIGURES, "REAL"
    )
    assert {name: columns.get(name) for name in CAPTURE_METHODS} == dict.fromkeys(
        CAPTURE_METHODS, "TEXT"
    )


def test_limits_judge_figures_in_their_worse_direction() -> None:
    # A maximum limits a figure whose higher values are worse, a minimum one whose lower are.
    for limit, (figure, is_max) in LIMIT_FIGURES.items():
        assert FIGURE[figure].better == (LOWER if is_max else HIGHER), limit
        assert figure in REVIEWED, limit


def test_reviewed_figures_have_a_direction_a_title_and_a_noise_floor() -> None:
    for name in REVIEWED:
        figure = FIGURE[name]
        assert figure.better in (HIGHER, LOWER) and figure.title, name
        assert NOISE_FLOORS[name] > 0
    assert list(FIGURE_DIRECTIONS) == list(REVIEWED)
    # Only a figure with a direction can be signed or bounded by clipping.
    for figure in FIGURES:
        if figure.signed or figure.clip_bound:
            assert figure.better is not None, figure.name


@pytest.mark.parametrize(
    ("figure", "value", "delta", "shown", "change"),
    [
        ("peak_v", 112.0, -38.0, "112 V", "\u221238 V"),
        ("damping_ratio", 0.31, 0.25, "0.31", "+0.25"),
        ("efficiency", 0.912, -0.002, "91.2 %", "\u22120.2 pt"),
        ("overshoot_pct", 12.5, 1.5, "12.5 %", "+1.5 pt"),
        ("snubber_loss_w", 0.041, 0.041, "41 mW", "+41 mW"),
    ],
)
def test_figures_in_words(figure: str, value: float, delta: float, shown: str, change: str):
    assert format_figure(figure, value) == shown
    assert format_change(figure, delta) == change
    assert format_figure(figure, None) == "—" and format_change(figure, float("nan")) == "—"
