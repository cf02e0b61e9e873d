"""Concurrency and committed manifests: one build per directory at a time (a live lock refuses,
a stale one is taken over), and `verify --against` / `--expect` / `--json` behave as documented."""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import REPO, build_dir, run_cli, write_project

from seqpipe import _build as build_module
from seqpipe import build
from seqpipe._hashing import hash_array, hash_file
from seqpipe._verify import verify
from seqpipe.errors import EXIT_LOCKED, BuildLockedError
from seqpipe.manifest import MANIFEST_NAME, dumps, seal
from seqpipe.recipe import load_recipe
from seqpipe.shards import read_shard, write_shard
from seqpipe.staging import PRIVATE


def build_args(recipe: Path, out: Path) -> list[str]:
    return ["build", str(recipe), "-o", str(out), "--workers", "1", "--quiet"]


def fingerprint_of(d: Path) -> str:
    return str(json.loads((d / MANIFEST_NAME).read_text())["fingerprint"])


def test_second_build_fails_fast_while_first_holds_the_lock(
    project: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """While a build holds the directory (paused inside its lock), a CLI build into the same
    directory exits 5 naming the lock file and the holder's PID, an API build raises
    BuildLockedError; the first build then completes and verifies."""
    out = tmp_path / "out"
    inside, release = threading.Event(), threading.Event()
    real = build_module._input_files

    def paused(*args: Any, **kwargs: Any) -> Any:
        inside.set()
        assert release.wait(timeout=120)
        return real(*args, **kwargs)

    monkeypatch.setattr(build_module, "_input_files", paused)
    result: dict[str, Any] = {}

    def first() -> None:
        try:
            result["build"] = build(load_recipe(project), out, workers=1, progress=False)
        except BaseException as exc:  # handed to the main thread below
            result["error"] = exc

    thread = threading.Thread(target=first)
    thread.start()
    try:
        assert inside.wait(timeout=120)
        lock = out / PRIVATE / "lock"
        proc = run_cli(build_args(project, out))
        assert proc.returncode == EXIT_LOCKED, proc.stderr
        assert str(lock) in proc.stderr and f"pid {os.getpid()}" in proc.stderr, proc.stderr
        assert "Traceback" not in proc.stderr
        with pytest.raises(BuildLockedError, match=f"pid {os.getpid()}") as info:
            build(load_recipe(project), out, workers=1, progress=False)
        assert info.value.exit_code == EXIT_LOCKED
    finally:
        release.set()
        thread.join(timeout=120)
    assert "error" not in result, result.get("error")
    report = verify(out)
    assert report.ok, report.problems
    assert report.fingerprint == result["build"].fingerprint
    assert not (out / PRIVATE / "lock").exists()  # released after the build


def test_two_cli_builds_started_together(tmp_path: Path) -> None:
    """Two CLI builds started at once into one directory: one exits 5 naming the other's PID,
    the other's dataset verifies with the expected fingerprint."""
    recipe = write_project(tmp_path / "src", files=12, paragraphs=200, shard_tokens=4000)
    expected = fingerprint_of(build_dir(recipe, tmp_path / "reference"))
    for attempt in range(3):  # builds take over a second; they overlap unless the machine stalls
        out = tmp_path / f"out-{attempt}"
        procs = [
            subprocess.Popen(
                [sys.executable, "-m", "seqpipe.cli", *build_args(recipe, out)],
                cwd=REPO,
                stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                text=True,
            )
            for _ in range(2)
        ]
        results = [(p, *p.communicate(timeout=300)) for p in procs]
        codes = sorted(p.returncode for p, _, _ in results)
        assert codes in ([0, 0], [0, EXIT_LOCKED]), [(p.returncode, err) for p, _, err in results]
        report = verify(out)
        assert report.ok and report.fingerprint == expected, report.problems
        if codes == [0, EXIT_LOCKED]:
            (winner, *_), (_, _, err) = sorted(results, key=lambda r: r[0].returncode)
            assert f"pid {winner.pid}" in err and str(out / PRIVATE / "lock") in err, err
            assert "Traceback" not in err
            return
    pytest.fail("the two builds never overlapped in three attempts")


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()  # reaped: no process has this PID until the PID space wraps
    return proc.pid


def _write_lock(out: Path, pid: int, host: str) -> Path:
    lock = out / PRIVATE / "lock"
    lock.parent.mkdir(parents=True, exist_ok=True)
    lock.write_text(json.dumps({"pid": pid, "host": host}))
    return lock


def test_stale_lock_is_taken_over(built_dataset: Path, project: Path) -> None:
    """A lock left by a process that is no longer running (this host) is taken over: the build
    runs, gives the same fingerprint, and removes the lock."""
    before = fingerprint_of(built_dataset)
    lock = _write_lock(built_dataset, _dead_pid(), socket.gethostname())
    proc = run_cli([*build_args(project, built_dataset), "--force"])
    assert proc.returncode == 0, proc.stderr
    assert fingerprint_of(built_dataset) == before and verify(built_dataset).ok
    assert not lock.exists()


HOLDER = r"""
import sys, time
from pathlib import Path
from seqpipe.staging import build_lock
with build_lock(Path(sys.argv[1])):
    print("held", flush=True)
    time.sleep(60)
"""


def test_a_held_lock_is_respected(built_dataset: Path, project: Path) -> None:
    """A lock held by a running build process makes another build exit 5 naming the holder's PID,
    and leaves the dataset and the lock as they were."""
    before = (built_dataset / MANIFEST_NAME).read_bytes()
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLDER, str(built_dataset)], stdout=subprocess.PIPE, text=True, cwd=REPO
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        proc = run_cli(build_args(project, built_dataset))
        lock_there = (built_dataset / PRIVATE / "lock").exists()
    finally:
        holder.kill()
        holder.communicate()
    assert proc.returncode == EXIT_LOCKED, proc.stderr
    assert f"pid {holder.pid}" in proc.stderr and socket.gethostname() in proc.stderr
    assert "Traceback" not in proc.stderr
    assert lock_there and (built_dataset / MANIFEST_NAME).read_bytes() == before


# -- committed manifests -----------------------------------------------------------------------------
def _verify_json(*args: str) -> tuple[int, dict[str, Any]]:
    proc = run_cli(["verify", *args, "--json"])
    assert "Traceback" not in proc.stderr
    return proc.returncode, json.loads(proc.stdout)


def test_verify_against_committed_manifest(built_dataset: Path, project: Path, tmp_path: Path) -> None:
    """`verify --against` passes with a copy of the dataset's manifest and fails, naming the
    fingerprints, after a rebuild with another recipe; --json output parses either way."""
    committed = tmp_path / "committed.json"
    shutil.copyfile(built_dataset / MANIFEST_NAME, committed)
    code, report = _verify_json(str(built_dataset), "--against", str(committed))
    assert code == 0 and report["ok"] and report["problems"] == []
    assert report["fingerprint"] == fingerprint_of(built_dataset)
    project.write_text(project.read_text().replace("tokens = 300", "tokens = 250"))
    build_dir(project, built_dataset)
    code, report = _verify_json(str(built_dataset), "--against", str(committed))
    assert code == 1 and not report["ok"]
    kinds = {(p["kind"], p["path"]) for p in report["problems"]}
    assert ("mismatch", MANIFEST_NAME) in kinds
    assert any("fingerprint" in p["detail"] for p in report["problems"])
    plain = run_cli(["verify", str(built_dataset), "--against", str(committed)])
    assert plain.returncode == 1 and "mismatch" in plain.stdout and "problem(s)" in plain.stderr


def test_committed_manifest_catches_a_resealed_tampering(built_dataset: Path, tmp_path: Path) -> None:
    """Ids changed in a shard with the dataset's manifest re-sealed to match pass a plain verify
    (it is self-consistent) but fail against the committed manifest, naming that shard."""
    committed = tmp_path / "committed.json"
    shutil.copyfile(built_dataset / MANIFEST_NAME, committed)
    m = json.loads((built_dataset / MANIFEST_NAME).read_text())
    entry = m["splits"]["train"]["shards"][0]
    path = built_dataset / entry["path"]
    ids = read_shard(path).copy()
    j = int(np.flatnonzero(ids != ids[0])[0])
    ids[[0, j]] = ids[[j, 0]]  # two ids swapped: same vocabulary, same length, other content
    write_shard(path, ids)
    entry.update(bytes=path.stat().st_size, hash=hash_file(path), token_hash=hash_array(ids))
    (built_dataset / MANIFEST_NAME).write_text(dumps(seal(m)))
    assert verify(built_dataset).ok  # a re-sealed manifest is self-consistent: verify alone cannot tell
    report = verify(built_dataset, against=committed)
    assert {p.path for p in report.problems if p.kind == "mismatch"} >= {entry["path"], MANIFEST_NAME}


@pytest.mark.parametrize(("expect", "code"), [(None, 0), ("0" * 32, 1), ("upper", 0)])
def test_verify_expect_fingerprint(built_dataset: Path, expect: str | None, code: int) -> None:
    """`verify --expect FP` passes for the dataset's fingerprint (any letter case) and fails for
    another; the --json report parses and says so."""
    fp = fingerprint_of(built_dataset)
    value = fp if expect is None else fp.upper() if expect == "upper" else expect
    got, report = _verify_json(str(built_dataset), "--expect", value)
    assert got == code and report["ok"] is (code == 0)
    if code:
        assert [p["kind"] for p in report["problems"]] == ["mismatch"] and fp in report["problems"][0]["detail"]


def test_verify_against_unusable_manifest(built_dataset: Path, tmp_path: Path) -> None:
    """A committed manifest that is missing or not JSON is a reported problem (exit 1), not a crash."""
    (tmp_path / "bad.json").write_text("{not json")
    for path in (tmp_path / "bad.json", tmp_path / "absent.json"):
        code, report = _verify_json(str(built_dataset), "--against", str(path))
        assert code == 1 and [p["kind"] for p in report["problems"]] == ["manifest"]
