"""Verify a built dataset: every byte of every listed file, nothing unlisted, the manifest's own
hashes, and optionally a committed manifest or an expected fingerprint.

Files are hashed on a thread pool (hashing and reads release the GIL): a local file from its
memory map, one thread per core; a URI's files streamed in large blocks, with more threads
than cores since their reads wait on the network.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from seqpipe._hashing import hash_file
from seqpipe.errors import DatasetError, ManifestError
from seqpipe.formats import PRIVATE
from seqpipe.manifest import MANIFEST_NAME, dumps, read_manifest, safe_relative, validate

TOP_LEVEL_OK = {MANIFEST_NAME, PRIVATE}


@dataclass(frozen=True)
class Problem:
    """One thing wrong: which file, what kind, and what differs."""

    path: str
    kind: str  # missing | truncated | corrupt | unlisted | manifest | mismatch | unsafe
    detail: str

    def __str__(self) -> str:
        return f"{self.path}: {self.kind}: {self.detail}"


@dataclass
class VerifyReport:
    directory: str
    fingerprint: str | None = None
    files_checked: int = 0
    bytes_checked: int = 0
    problems: list[Problem] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        return {
            "directory": self.directory,
            "ok": self.ok,
            "fingerprint": self.fingerprint,
            "files_checked": self.files_checked,
            "bytes_checked": self.bytes_checked,
            "problems": [asdict(p) for p in self.problems],
        }


def listed_files(manifest: dict[str, Any]) -> list[dict[str, Any]]:
    """Every file the manifest lists, as {path, bytes, hash}."""
    out = [
        {
            "path": manifest["vocabulary"]["path"],
            "bytes": manifest["vocabulary"]["bytes"],
            "hash": manifest["vocabulary"]["hash"],
        }
    ]
    out += [dict(f) for f in manifest["tokenizer"]["files"]]
    for sp in manifest["splits"].values():
        out.append(dict(sp["docs"]))
        out += [{"path": s["path"], "bytes": s["bytes"], "hash": s["file_hash"]} for s in sp["shards"]]
    return out


def check_local_file(directory: Path, entry: dict[str, Any]) -> tuple[int, Problem | None]:
    """Bytes read and the problem (if any) with one listed file of a local dataset."""
    rel = entry["path"]
    try:
        path = safe_relative(directory, rel)
    except DatasetError as exc:
        return 0, Problem(rel, "unsafe", str(exc))
    if not path.is_file():
        return 0, Problem(rel, "missing", "listed in the manifest but not on disk")
    size = path.stat().st_size
    if size != entry["bytes"]:
        kind = "truncated" if size < entry["bytes"] else "corrupt"
        return size, Problem(rel, kind, f"{size} bytes on disk, manifest says {entry['bytes']}")
    digest = hash_file(path)
    if digest != entry["hash"]:
        return size, Problem(rel, "corrupt", f"content hash {digest}, manifest says {entry['hash']}")
    return size, None


def _unlisted(directory: Path, manifest: dict[str, Any], listed: set[str]) -> list[Problem]:
    problems = []
    allowed_dirs = {"shards", "docs"}
    for entry in sorted(os.listdir(directory)):
        if entry in TOP_LEVEL_OK or entry in listed or entry in allowed_dirs:
            continue
        problems.append(Problem(entry, "unlisted", "not part of the dataset (not in the manifest)"))
    for top in sorted(allowed_dirs):
        root = directory / top
        if not root.is_dir():
            continue
        for dirpath, dirnames, filenames in os.walk(root):
            dirnames.sort()
            for name in sorted(filenames):
                rel = Path(dirpath, name).relative_to(directory).as_posix()
                if rel not in listed:
                    problems.append(
                        Problem(rel, "unlisted", "file in a dataset folder that the manifest does not list")
                    )
    return problems


def _read_local(directory: Path) -> tuple[bytes, dict[str, Any]]:
    manifest = read_manifest(directory)
    return (directory / MANIFEST_NAME).read_bytes(), manifest


def _compare(manifest: dict[str, Any], committed: dict[str, Any]) -> list[Problem]:
    """Differences between the dataset's manifest and a committed one."""
    problems = []
    for key in ("recipe_fingerprint", "dataset_fingerprint"):
        if manifest[key] != committed[key]:
            problems.append(Problem(MANIFEST_NAME, "mismatch", f"{key} {manifest[key]}, committed {committed[key]}"))
    if manifest["vocabulary"]["hash"] != committed["vocabulary"]["hash"]:
        problems.append(
            Problem(manifest["vocabulary"]["path"], "mismatch", "vocabulary differs from the committed one")
        )
    mine = {f["path"]: f["hash"] for f in listed_files(manifest)}
    theirs = {f["path"]: f["hash"] for f in listed_files(committed)}
    for path in sorted(set(mine) | set(theirs)):
        if path not in mine:
            problems.append(Problem(path, "mismatch", "in the committed manifest but not in this dataset"))
        elif path not in theirs:
            problems.append(Problem(path, "mismatch", "in this dataset but not in the committed manifest"))
        elif mine[path] != theirs[path]:
            problems.append(Problem(path, "mismatch", f"hash {mine[path]}, committed {theirs[path]}"))
    return problems


def verify(
    directory: str | Path, *, against: str | Path | None = None, expect: str | None = None, threads: int | None = None
) -> VerifyReport:
    """Recompute every hash of a dataset and report each problem found (never raises for them).

    ``directory`` may be a filesystem URI (see :mod:`seqpipe.remote`): its files are streamed
    and hashed, and files it holds are listed recursively.
    """
    from seqpipe.filesystem import is_uri

    read: Callable[[], tuple[bytes, dict[str, Any]]]
    check: Callable[[dict[str, Any]], tuple[int, Problem | None]]
    unlisted: Callable[[dict[str, Any], set[str]], list[Problem]]
    if is_uri(directory):
        from seqpipe import remote

        where = remote.open_remote(str(directory), key="directory")
        report = VerifyReport(where.uri)
        read = lambda: remote.read_remote_manifest(where)  # noqa: E731
        check = lambda e: remote.check_remote_file(where, e)  # noqa: E731
        unlisted = lambda _, listed: remote.remote_unlisted(where, listed, TOP_LEVEL_OK)  # noqa: E731
    else:
        d = Path(directory)
        report = VerifyReport(str(d))
        read = lambda: _read_local(d)  # noqa: E731
        check = lambda e: check_local_file(d, e)  # noqa: E731
        unlisted = lambda manifest, listed: _unlisted(d, manifest, listed)  # noqa: E731
    try:
        raw, manifest = read()
    except (ManifestError, DatasetError) as exc:
        report.problems.append(Problem(MANIFEST_NAME, "manifest", str(exc)))
        return report
    report.fingerprint = manifest["dataset_fingerprint"]
    if raw != dumps(manifest).encode("ascii"):
        report.problems.append(
            Problem(
                MANIFEST_NAME, "manifest", "its bytes differ from the form seqpipe writes (same content, edited layout)"
            )
        )
    entries = listed_files(manifest)
    # a local file is hashed from its memory map, which is CPU work: one thread per core; a
    # URI's reads wait on the network, so more threads keep more requests in flight
    cores = os.cpu_count() or 2
    workers = threads or (min(8, cores * 2) if is_uri(directory) else cores)
    workers = max(1, min(workers, len(entries)))
    if workers == 1:
        results = [check(e) for e in entries]
    else:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            results = list(pool.map(check, entries))
    for size, problem in results:
        report.files_checked += 1
        report.bytes_checked += size
        if problem:
            report.problems.append(problem)
    report.problems += unlisted(manifest, {e["path"] for e in entries})
    if against is not None:
        try:
            committed = validate(json.loads(Path(against).read_text(encoding="utf-8")), str(against))
        except (OSError, ValueError, ManifestError) as exc:
            report.problems.append(Problem(str(against), "manifest", f"committed manifest unusable: {exc}"))
        else:
            report.problems += _compare(manifest, committed)
    if expect is not None and expect.lower() != manifest["dataset_fingerprint"]:
        report.problems.append(
            Problem(
                MANIFEST_NAME, "mismatch", f"dataset fingerprint {manifest['dataset_fingerprint']}, expected {expect}"
            )
        )
    return report
