"""The output directory's private area (seqpipe/staging.py): the build lock and the publish order."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from seqpipe import staging
from seqpipe.errors import EXIT_LOCKED, BuildLockedError, SeqpipeError
from seqpipe.formats import PRIVATE
from seqpipe.staging import build_lock, private_dir, publish


def dead_pid() -> int:
    """The PID of a process of this host that has exited."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def write_lock(out: Path, pid: int, host: str) -> Path:
    lock = out / PRIVATE / "lock"
    lock.parent.mkdir(parents=True, exist_ok=True)
    lock.write_text(json.dumps({"pid": pid, "host": host}))
    return lock


def test_a_held_lock_refuses_another_build_with_the_locked_exit_code(tmp_path: Path) -> None:
    """While a live process holds the lock, taking it raises BuildLockedError (exit code 5, the
    lock's path and holder in the message) and the holder's lock stays."""
    with build_lock(tmp_path) as lock:
        with pytest.raises(BuildLockedError) as caught, build_lock(tmp_path):
            pass
        assert json.loads(lock.read_text())["pid"] == os.getpid()
    err = caught.value
    assert isinstance(err, SeqpipeError) and err.exit_code == EXIT_LOCKED == 5
    assert str(lock) in str(err) and f"pid {os.getpid()}" in str(err)
    assert not lock.exists()  # released on leaving


def test_a_lock_of_another_host_is_respected(tmp_path: Path) -> None:
    """A lock written on another host (whose processes this one cannot see) refuses the build."""
    lock = write_lock(tmp_path, dead_pid(), "elsewhere.invalid")
    with pytest.raises(BuildLockedError, match=r"elsewhere\.invalid"), build_lock(tmp_path):
        pass
    assert json.loads(lock.read_text())["host"] == "elsewhere.invalid"


def test_a_stale_lock_is_taken_over_and_released(tmp_path: Path) -> None:
    """A lock left by an exited process of this host is replaced by this process's own, which
    is removed on leaving."""
    write_lock(tmp_path, dead_pid(), socket.gethostname())
    with build_lock(tmp_path) as lock:
        assert json.loads(lock.read_text()) == {"pid": os.getpid(), "host": socket.gethostname()}
    assert not lock.exists()


def staged(stage: Path, version: str) -> list[str]:
    """A small dataset's entries written into ``stage``, the manifest beside them."""
    (stage / "shards" / "train").mkdir(parents=True)
    (stage / "shards" / "train" / "000000.arrow").write_text(f"shard {version}")
    (stage / "docs").mkdir()
    (stage / "docs" / "train.arrow").write_text(f"docs {version}")
    (stage / "vocab.arrow").write_text(f"vocab {version}")
    (stage / "manifest.json").write_text(f"manifest {version}")
    return ["vocab.arrow", "docs", "shards"]


def test_publish_moves_every_entry_and_the_manifest_last(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Publishing over an old dataset removes the old manifest before moving anything, moves
    every staged entry into place, and renames the new manifest in last."""
    out = tmp_path / "out"
    staged(out, "old")
    stage = private_dir(out) / "stage" / "b1"
    stage.mkdir(parents=True)
    entries = staged(stage, "new")
    moves: list[tuple[str, bool]] = []  # (target, was an old or new manifest in place at the time)
    real_rename = os.rename

    def recording_rename(src: str | Path, dst: str | Path) -> None:
        if Path(dst).parent == out:
            moves.append((Path(dst).name, (out / "manifest.json").exists()))
        real_rename(src, dst)

    monkeypatch.setattr(staging.os, "rename", recording_rename)
    publish(out, stage, entries, "manifest.json")
    assert moves[-1] == ("manifest.json", False)
    assert sorted(name for name, _ in moves[:-1]) == sorted(entries)
    assert not any(manifest_there for _, manifest_there in moves)  # the old manifest went first
    for rel, text in {
        "manifest.json": "manifest new",
        "vocab.arrow": "vocab new",
        "docs/train.arrow": "docs new",
        "shards/train/000000.arrow": "shard new",
    }.items():
        assert (out / rel).read_text() == text
    assert not (private_dir(out) / "trash").exists()
