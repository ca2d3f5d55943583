"""`emberscore demo` end to end, and the analyst's reproduction of its table from its files.

The demo's table is `emberscore evaluate`'s table for the files it writes; replaying its events
file with `emberscore backfill` and evaluating the result must print the same table.
"""

from __future__ import annotations

import contextlib
import io
from pathlib import Path

import pytest

from service.cli import main
from service.files import read_events, read_labels, read_scores


def _table(text: str) -> str:
    start = text.index("emberscore evaluation")
    return text[start : text.index("notes:", start)]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    folder = tmp_path_factory.mktemp("demo")
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        status = main(["demo", "--out", str(folder), "--events", "20000", "--seed", "3"])
    assert status == 0
    return folder, out.getvalue()


def test_demo_writes_the_files_of_the_formats(demo: tuple[Path, str]) -> None:
    folder, text = demo
    events = read_events(folder / "events.csv").table
    labels = read_labels(folder / "labels.csv").table
    scores = read_scores(folder / "scores.csv")
    assert len(events) == len(scores) > 15000
    assert len(labels) > 100
    assert scores.current_decision is not None  # the rules' decisions ride along
    assert "events/s" in text
    assert "human review path" in text


def test_demo_table_compares_both_sides(demo: tuple[Path, str]) -> None:
    _, text = demo
    table = _table(text)
    for row in ("average precision", "ROC AUC", "recall", "precision", "attack:takeover"):
        assert row in table
    assert "emberscore" in table
    assert "rules" in table


def test_backfill_then_evaluate_reproduce_the_table(
    demo: tuple[Path, str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder, text = demo
    scores = tmp_path / "scores.csv"
    events, labels, segments = (folder / f"{n}.csv" for n in ("events", "labels", "segments"))
    assert main(["backfill", str(events), "--labels", str(labels), "--out", str(scores),
                 "--no-progress"]) == 0  # fmt: skip
    capsys.readouterr()
    assert main(["evaluate", str(scores), "--labels", str(labels), "--alert-rates", "0.01",
                 "--segments", str(segments)]) == 0  # fmt: skip
    assert _table(capsys.readouterr().out) == _table(text)
    assert scores.read_bytes() == (folder / "scores.csv").read_bytes()
