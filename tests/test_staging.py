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
from seqpipe.errors import EXIT_DATASET, EXIT_LOCKED, BuildLockedError, DatasetError, SeqpipeError
from seqpipe.formats import PRIVATE
from seqpipe.staging import build_lock, check_output, private_dir, publish


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


def test_a_lock_file_without_a_live_holder_is_taken_whatever_it_says(tmp_path: Path) -> None:
    """A lock file left behind (even naming another host) holds nothing once its process is gone:
    the kernel lock died with it, so the next build takes it and removes it on leaving."""
    write_lock(tmp_path, dead_pid(), "elsewhere.invalid")
    with build_lock(tmp_path) as lock:
        assert json.loads(lock.read_text()) == {"pid": os.getpid(), "host": socket.gethostname()}
    assert not lock.exists()


def test_a_stale_lock_is_taken_over_and_released(tmp_path: Path) -> None:
    """A lock left by an exited process of this host is replaced by this process's own, which
    is removed on leaving."""
    write_lock(tmp_path, dead_pid(), socket.gethostname())
    with build_lock(tmp_path) as lock:
        assert json.loads(lock.read_text()) == {"pid": os.getpid(), "host": socket.gethostname()}
    assert not lock.exists()


# Each child takes the lock (retrying while it is held), marks itself the holder with an
# exclusive create, and dies without releasing, as a killed build does; a second holder at
# the same time finds the mark and exits 3.
RACER = r"""
import os, sys, time
from pathlib import Path
from seqpipe.errors import BuildLockedError
from seqpipe.staging import build_lock
out, start = Path(sys.argv[1]), float(sys.argv[2])
while time.time() < start:
    time.sleep(0.001)
deadline = time.time() + 60
while True:
    try:
        ctx = build_lock(out)
        ctx.__enter__()
        break
    except BuildLockedError:
        if time.time() > deadline:
            os._exit(4)
try:
    fd = os.open(out / "holder", os.O_CREAT | os.O_EXCL | os.O_WRONLY)
except FileExistsError:
    os._exit(3)
time.sleep(0.02)
os.close(fd)
os.unlink(out / "holder")
os._exit(0)
"""


def test_two_processes_never_hold_the_lock_at_once(tmp_path: Path) -> None:
    """Processes that die holding the lock (stale locks) and others racing to take it over:
    never are two holders at once, and every one gets its turn."""
    import time

    from conftest import REPO

    write_lock(tmp_path, dead_pid(), socket.gethostname())
    for _ in range(3):
        start = time.time() + 1.5  # every racer imported and waiting before the start
        racers = [
            subprocess.Popen([sys.executable, "-c", RACER, str(tmp_path), str(start)], cwd=REPO) for _ in range(6)
        ]
        codes = [proc.wait(timeout=120) for proc in racers]
        assert codes == [0] * 6, codes


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


@pytest.mark.parametrize("foreign", ["docs", "shards", "vocab.arrow", "tokenizer.arrow", "notes.txt"])
def test_a_build_into_a_directory_that_was_never_a_dataset_is_refused(tmp_path: Path, foreign: str) -> None:
    """A directory holding anything but an earlier seqpipe dataset (a project's docs/, a stray
    vocab.arrow) is refused with exit code 4 naming what is in the way, and nothing is touched."""
    from conftest import run_cli, write_project

    recipe = write_project(tmp_path / "src")
    out = tmp_path / "project"
    out.mkdir()
    target = out / foreign
    if foreign in ("docs", "shards"):
        target.mkdir()
        (target / "guide.md").write_text("the ferry timetable")
    else:
        target.write_text("the ferry timetable")
    before = sorted(str(p.relative_to(out)) for p in out.rglob("*"))
    proc = run_cli(["build", str(recipe), "-o", str(out), "--workers", "1", "--quiet"])
    assert proc.returncode == EXIT_DATASET, proc.stderr
    assert foreign in proc.stderr and "Traceback" not in proc.stderr
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*")) == before
    assert not (out / PRIVATE).exists()


def test_output_check_allows_new_empty_and_earlier_datasets_only(tmp_path: Path) -> None:
    """New or empty directories and a seqpipe dataset (manifest plus what it lists) may be built
    into; an unlisted extra file or a manifest of another program may not."""
    check_output(tmp_path / "new")
    (tmp_path / "empty").mkdir()
    check_output(tmp_path / "empty")
    ds = tmp_path / "ds"
    (ds / "shards" / "train").mkdir(parents=True)
    (ds / "vocab.arrow").write_text("v")
    manifest = {
        "format": "seqpipe-dataset/1",
        "inputs": [{"path": "corpus/a.txt"}],
        "vocabulary": {"path": "vocab.arrow"},
        "splits": {"train": {"shards": [{"path": "shards/train/000000.arrow"}]}},
    }
    (ds / "manifest.json").write_text(json.dumps(manifest))
    check_output(ds)
    (ds / "corpus").mkdir()  # listed only as an input, not as a file of the dataset
    with pytest.raises(DatasetError, match="corpus"):
        check_output(ds)
    (ds / "corpus").rmdir()
    (ds / "manifest.json").write_text(json.dumps({"format": "other-tool/3"}))
    with pytest.raises(DatasetError, match="not a seqpipe manifest"):
        check_output(ds)


def test_a_parts_cache_kept_inside_the_output_directory_is_not_in_the_way(tmp_path: Path) -> None:
    """A build whose --cache lies inside its output directory can be run again: the cache's
    folder is not taken for a stranger's file."""
    from conftest import build_dir, write_project

    recipe = write_project(tmp_path / "src")
    out = tmp_path / "out"
    build_dir(recipe, out, cache_dir=out / "parts-cache")
    build_dir(recipe, out, cache_dir=out / "parts-cache")
    assert (out / "manifest.json").exists()
    with pytest.raises(DatasetError, match="parts-cache"):
        check_output(out)


def test_owned_entries_follow_a_replaced_manifest(tmp_path: Path) -> None:
    """The names a manifest lists are remembered only while it is the same file: a manifest
    replaced by one listing other entries (or by a foreign one) is read again."""
    owned_entries = staging.owned_entries

    def put(body: dict[str, object]) -> None:
        tmp = tmp_path / "manifest.json.tmp"
        tmp.write_text(json.dumps(body))
        os.replace(tmp, tmp_path / "manifest.json")

    put({"format": "seqpipe.dataset/1", "splits": {"train": {"shards": [{"path": "shards/a.arrow"}]}}})
    assert owned_entries(tmp_path) == {"shards", "manifest.json"}
    assert owned_entries(tmp_path) == {"shards", "manifest.json"}
    put({"format": "seqpipe.dataset/1", "vocabulary": {"path": "vocab.arrow"}})
    assert owned_entries(tmp_path) == {"vocab.arrow", "manifest.json"}
    put({"format": "other"})
    assert owned_entries(tmp_path) is None


def test_the_published_manifest_is_remembered_as_its_file_would_be_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """After a build publishes, the entries remembered for its manifest are those reading the file
    gives (the summary's list of skipped matches included); a rebuild
    in this process then does not parse the manifest to check its output directory, and a
    manifest changed on disk is read again."""
    from conftest import build_dir, write_project

    recipe = write_project(tmp_path / "src", files=2, paragraphs=5)
    (tmp_path / "src" / "corpus" / "sub.txt").mkdir()  # a skipped match listed in the summary
    out = build_dir(recipe, tmp_path / "out")
    remembered = staging._LISTED[str(out / "manifest.json")][1]
    staging._LISTED.clear()
    read = staging.owned_entries(out)
    assert read is not None and remembered is not None and read == remembered | {"manifest.json"}
    build_dir(recipe, out)
    parsed: list[str] = []
    real_loads = json.loads
    monkeypatch.setattr(staging.json, "loads", lambda text, *a, **k: parsed.append("x") or real_loads(text, *a, **k))
    assert staging.owned_entries(out) == read
    assert parsed == []
    text = (out / "manifest.json").read_text()
    (out / "manifest.json").write_text(text.replace('"format"', '"format" ', 1))
    staging.owned_entries(out)
    assert parsed == ["x"]
