"""Checkpoints and saved models of ``emberscore backfill``.

A run is stopped part-way, in two ways: a fault injected after a given chunk (the one place a test
double is used: `service.workers.backfill.FAULT_HOOK`), and a real ``SIGKILL`` of a subprocess at
the same point, which runs no clean-up at all. Started again with the same arguments, the run
must resume from its checkpoint and write a file byte for byte equal to an uninterrupted run's.

Frozen models are checked against the per-event engine scoring with the same snapshot while its
learner keeps applying labels to the identifier statistics (and publishes nowhere).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from test_backfill_support import (
    SECRET,
    assert_matches,
    clean_environment,
    per_event_replay,
    reference,
    scenario,
    settings,
    write_stream,
)

from scoring.fusion import ModelSnapshot
from service.cli import main
from service.workers import backfill

CHUNK = "1500"  # ~8,300 events: six chunks


class InjectedFault(BaseException):
    """Stands for the process dying: not an error the command handles."""


@pytest.fixture(scope="module")
def stream(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return Path(write_stream(tmp_path_factory.mktemp("stream"), ("csv", "parquet")))


@pytest.fixture(autouse=True)
def environment(monkeypatch: pytest.MonkeyPatch) -> None:
    clean_environment(monkeypatch)


def arguments(stream: Path, fmt: str, out: Path, *extra: str | Path) -> list[str]:
    return [
        "backfill",
        str(stream / f"events.{fmt}"),
        "--labels",
        str(stream / f"labels.{fmt}"),
        "--out",
        str(out),
        "--checkpoint-every",
        CHUNK,
        "--no-progress",
        *(str(e) for e in extra),
    ]


def fail_after(number: int) -> object:
    def hook(chunk: int) -> None:
        if chunk == number:
            raise InjectedFault(f"stopped after chunk {chunk}")

    return hook


def test_an_interrupted_csv_run_resumes_to_the_same_bytes(
    stream: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    clean = tmp_path / "clean.csv"
    assert main(arguments(stream, "csv", clean)) == 0
    out, folder = tmp_path / "scores.csv", tmp_path / "checkpoint"
    monkeypatch.setattr(backfill, "FAULT_HOOK", fail_after(2))
    with pytest.raises(InjectedFault):
        main(arguments(stream, "csv", out, "--checkpoint", folder))
    assert not out.exists()
    kept = sorted(p.name for p in folder.iterdir())
    assert kept == [
        "learned.msgpack",
        "learned.npz",
        "manifest.json",
        "plan.npz",
        "scores-00000.msgpack",
        "scores-00001.msgpack",
        "scores-00002.msgpack",
    ]
    monkeypatch.setattr(backfill, "FAULT_HOOK", None)
    capsys.readouterr()
    assert main(arguments(stream, "csv", out, "--checkpoint", folder)) == 0
    assert "3 of 6 chunks reused" in capsys.readouterr().out
    assert out.read_bytes() == clean.read_bytes()
    assert not folder.exists()  # removed once the run is complete
    assert_matches(out, reference().scores)


def test_a_killed_parquet_run_resumes_to_the_same_bytes(stream: Path, tmp_path: Path) -> None:
    """SIGKILL: no finally block runs, the half-written output's temporary file stays behind;
    the resumed run removes it and writes the very bytes of an uninterrupted run."""
    clean = tmp_path / "clean.parquet"
    assert main(arguments(stream, "parquet", clean)) == 0
    out, folder = tmp_path / "scores.parquet", tmp_path / "checkpoint"
    script = textwrap.dedent(
        f"""
        import os, signal, sys
        from service.cli import main
        from service.workers import backfill

        def hook(chunk):
            if chunk == 3:
                os.kill(os.getpid(), signal.SIGKILL)

        backfill.FAULT_HOOK = hook
        sys.exit(main({arguments(stream, "parquet", out, "--checkpoint", folder)!r}))
        """
    )
    env = {k: v for k, v in os.environ.items() if not k.startswith("EMBERSCORE_")}
    env["EMBERSCORE_HASH_SECRET"] = SECRET
    done = subprocess.run(
        [sys.executable, "-c", script], env=env, capture_output=True, timeout=300, check=False
    )
    assert done.returncode == -signal.SIGKILL, done.stderr.decode()
    assert not out.exists()
    assert list(tmp_path.glob(".scores.parquet.*.part"))  # what the kill left behind
    assert len(list(folder.glob("scores-*.msgpack"))) == 4
    assert main(arguments(stream, "parquet", out, "--checkpoint", folder)) == 0
    assert out.read_bytes() == clean.read_bytes()
    assert not list(tmp_path.glob(".scores.parquet.*"))


def test_a_checkpoint_of_other_inputs_or_settings_is_refused(
    stream: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    out, folder = tmp_path / "scores.csv", tmp_path / "checkpoint"
    monkeypatch.setattr(backfill, "FAULT_HOOK", fail_after(0))
    with pytest.raises(InjectedFault):
        main(arguments(stream, "csv", out, "--checkpoint", folder))
    monkeypatch.setattr(backfill, "FAULT_HOOK", None)
    monkeypatch.setenv("EMBERSCORE_REVIEW_AT", "0.3")
    capsys.readouterr()
    assert main(arguments(stream, "csv", out, "--checkpoint", folder)) == 2
    err = capsys.readouterr().err
    assert "holds the checkpoint of a run with other input files, settings" in err
    monkeypatch.delenv("EMBERSCORE_REVIEW_AT")
    other = tmp_path / "events.csv"
    other.write_bytes((stream / "events.csv").read_bytes().replace(b"login", b"signup", 1))
    args = arguments(stream, "csv", out, "--checkpoint", folder)
    args[1] = str(other)
    assert main(args) == 2
    assert "other input files" in capsys.readouterr().err
    assert not out.exists()


def test_a_folder_of_other_things_is_not_taken_as_a_checkpoint(
    stream: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder = tmp_path / "photos"
    folder.mkdir()
    (folder / "holiday.jpg").write_bytes(b"not ours")
    out = tmp_path / "scores.csv"
    assert main(arguments(stream, "csv", out, "--checkpoint", folder)) == 2
    assert "is not empty and holds no backfill checkpoint" in capsys.readouterr().err
    assert (folder / "holiday.jpg").read_bytes() == b"not ours"


# --- saved and frozen models -------------------------------------------------------------------


def test_saved_model_is_the_per_event_learners_last_snapshot(stream: Path, tmp_path: Path) -> None:
    model = tmp_path / "model.msgpack"
    assert main(arguments(stream, "csv", tmp_path / "s.csv", "--save-model", model)) == 0
    saved = ModelSnapshot.from_bytes(model.read_bytes())
    published = reference().store.snapshot
    assert published is not None
    expected = ModelSnapshot.from_bytes(published)
    assert (saved.version, saved.positives, saved.negatives) == (
        expected.version,
        expected.positives,
        expected.negatives,
    )
    assert saved.features == expected.features
    for name in ("counts", "means", "variances", "weights"):
        np.testing.assert_allclose(getattr(saved, name), getattr(expected, name), rtol=1e-9)
    assert saved.intercept == pytest.approx(expected.intercept, rel=1e-9)


def test_a_frozen_model_scores_without_learning(
    stream: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--model: the snapshot scores every event; labels still reach the identifier statistics
    (the bad-rate features) but teach the model nothing."""
    model = tmp_path / "model.msgpack"
    assert main(arguments(stream, "csv", tmp_path / "s1.csv", "--save-model", model)) == 0
    snapshot = ModelSnapshot.from_bytes(model.read_bytes())
    out, again = tmp_path / "frozen.parquet", tmp_path / "again.msgpack"
    capsys.readouterr()
    assert main(arguments(stream, "csv", out, "--model", model, "--save-model", again)) == 0
    summary = capsys.readouterr().out
    assert f"frozen: version {snapshot.version} from {model}, no learning" in summary
    assert again.read_bytes() == model.read_bytes()
    sc = scenario()
    expected = per_event_replay(sc.events, sc.labels, settings(), frozen=snapshot)
    assert_matches(out, expected.scores)
    assert not np.array_equal(expected.scores.risk, reference().scores.risk)


def test_a_damaged_checkpoint_file_is_a_clear_error(
    stream: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    out, folder = tmp_path / "scores.csv", tmp_path / "checkpoint"
    monkeypatch.setattr(backfill, "FAULT_HOOK", fail_after(1))
    with pytest.raises(InjectedFault):
        main(arguments(stream, "csv", out, "--checkpoint", folder))
    monkeypatch.setattr(backfill, "FAULT_HOOK", None)
    (folder / "scores-00001.msgpack").write_bytes(b"garbage")
    capsys.readouterr()
    assert main(arguments(stream, "csv", out, "--checkpoint", folder)) == 2
    err = capsys.readouterr().err
    assert "scores-00001.msgpack: checkpoint file is damaged" in err
    assert "delete the folder to start over" in err
    assert "Traceback" not in err
    assert not out.exists()
