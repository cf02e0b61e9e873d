"""Verify a built dataset: every byte of every listed file, nothing unlisted, the manifest's own
hashes, and optionally a committed manifest or an expected fingerprint.

Written once over :class:`seqpipe.storage.Store`, so a local directory and a dataset behind a
filesystem URI are checked by the same code: one per-file check (:func:`check_file`, which
publish and fetch also use to find files already in place), one scan for unlisted files, and
the store's one rule for paths. Files are hashed on a thread pool (hashing and reads release
the GIL) as wide as the store asks: a local file from its memory map, one thread per core; a
URI's files streamed in large blocks, with more threads than cores since their reads wait on
the network.
"""

from __future__ import annotations

import json
import os
import stat
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Final

from seqpipe.errors import DatasetError, ManifestError, ShardMissingError, UnsafePathError
from seqpipe.formats import DOCS_DIR, PRIVATE, SHARDS_DIR
from seqpipe.manifest import MANIFEST_NAME, MAX_MANIFEST_BYTES, dumps, is_old_format, parse_manifest, validate
from seqpipe.storage import Store, open_store

TOP_LEVEL_OK: Final = frozenset({MANIFEST_NAME, PRIVATE})  # top-level names that are never unlisted
DATA_DIRS: Final = (DOCS_DIR, SHARDS_DIR)  # the folders that hold listed files only


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
        out.append(dict(sp["document_table"]))
        out += [{"path": s["path"], "bytes": s["bytes"], "hash": s["hash"]} for s in sp["shards"]]
    return out


def check_file(store: Store, entry: dict[str, Any]) -> tuple[int, Problem | None]:
    """Bytes read and the problem (if any) with one listed file: a path the store refuses, no
    file there, another size, or another content hash. Never raises for what it finds."""
    rel = entry["path"]
    try:
        store.check_path(rel)
    except UnsafePathError as exc:
        return 0, Problem(rel, "unsafe", str(exc))
    try:
        st = store.stat(rel)
        if st is None or not st.is_file:
            return 0, Problem(rel, "missing", "listed in the manifest but not in the dataset")
        if st.size != entry["bytes"]:
            kind = "truncated" if st.size < entry["bytes"] else "corrupt"
            return st.size, Problem(rel, kind, f"{st.size} bytes stored, manifest says {entry['bytes']}")
        digest = store.hash(rel)
    except ShardMissingError:  # removed between the stat and the read
        return 0, Problem(rel, "missing", "listed in the manifest but not in the dataset")
    except DatasetError as exc:
        return 0, Problem(rel, "missing", f"listed in the manifest but cannot be read: {exc}")
    if digest != entry["hash"]:
        return st.size, Problem(rel, "corrupt", f"content hash {digest}, manifest says {entry['hash']}")
    return st.size, None


def check_files(
    store: Store, entries: list[dict[str, Any]], threads: int | None = None
) -> list[tuple[int, Problem | None]]:
    """:func:`check_file` for each entry, in order, on ``threads`` threads (default: the
    store's ``read_threads``); hashing and reads release the GIL."""
    workers = max(1, min(threads or store.read_threads, len(entries)))
    if workers == 1:
        return [check_file(store, e) for e in entries]
    with ThreadPoolExecutor(max_workers=workers) as pool:
        return list(pool.map(check_file, [store] * len(entries), entries))


def unlisted(store: Store, listed: set[str]) -> list[Problem]:
    """What the dataset holds beyond its manifest: top-level names by name (the manifest and the
    private area aside), and each file below the data folders by path."""
    problems = []
    for top in store.list_dir():
        if top in DATA_DIRS:
            st = store.stat(top)
            below = [top] if st is not None and st.is_file else store.list_files(top)
            problems += [
                Problem(rel, "unlisted", "file in a dataset folder that the manifest does not list")
                for rel in below
                if rel not in listed
            ]
            problems += [
                Problem(rel, "unsafe" if "symlink" in why else "unlisted", f"{why} in a dataset folder")
                for rel, why in store.stray_folders(top)
            ]
        elif top not in TOP_LEVEL_OK and top not in listed:
            problems.append(Problem(top, "unlisted", "not part of the dataset (not in the manifest)"))
    return sorted(problems, key=lambda p: (p.path.split("/", 1)[0] in DATA_DIRS, p.path))


def _compare(manifest: dict[str, Any], committed: dict[str, Any]) -> list[Problem]:
    """Differences between the dataset's manifest and a committed one."""
    problems = []
    for key in ("recipe_fingerprint", "fingerprint"):
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
    directory: str | Path | Store,
    *,
    against: str | Path | None = None,
    expect: str | None = None,
    threads: int | None = None,
) -> VerifyReport:
    """Recompute every hash of a dataset and report each problem found (never raises for them;
    a dataset an older seqpipe wrote raises ManifestError, since this version cannot check it).

    ``directory`` may be a filesystem URI (see :mod:`seqpipe.storage`): its files are then
    streamed and hashed, and the files it holds listed recursively. ``threads`` overrides how
    many files are hashed at once.
    """
    store = open_store(directory)
    report = VerifyReport(store.location)
    try:
        store.check_path(MANIFEST_NAME)  # a manifest that is a symlink leading outside is not this dataset's
    except UnsafePathError as exc:
        report.problems.append(Problem(MANIFEST_NAME, "unsafe", str(exc)))
        return report
    try:
        raw = store.read_manifest()
        manifest = parse_manifest(raw, store.where(MANIFEST_NAME))
    except (ManifestError, DatasetError) as exc:
        if isinstance(exc, ManifestError) and is_old_format(exc):
            raise  # not damage to report: this version cannot check the dataset at all
        report.problems.append(Problem(MANIFEST_NAME, "manifest", str(exc)))
        return report
    report.fingerprint = manifest["fingerprint"]
    if raw != dumps(manifest).encode("ascii"):
        report.problems.append(
            Problem(
                MANIFEST_NAME, "manifest", "its bytes differ from the form seqpipe writes (same content, edited layout)"
            )
        )
    entries = listed_files(manifest)
    for size, problem in check_files(store, entries, threads):
        report.files_checked += 1
        report.bytes_checked += size
        if problem:
            report.problems.append(problem)
    report.problems += unlisted(store, {e["path"] for e in entries})
    if against is not None:
        report.problems += _against(manifest, against)
    if expect is not None and expect.lower() != manifest["fingerprint"]:
        report.problems.append(
            Problem(MANIFEST_NAME, "mismatch", f"fingerprint {manifest['fingerprint']}, expected {expect}")
        )
    return report


def _against(manifest: dict[str, Any], against: str | Path) -> list[Problem]:
    """Differences from the committed manifest in the local file ``against``, or why it is unusable."""
    where = str(against)
    try:
        # A FIFO or a device would block the read (or never end): only a regular file is read,
        # and only up to the manifest size limit.
        st = os.stat(against)
        if not stat.S_ISREG(st.st_mode):
            raise ManifestError(f"{where}: not a regular file; give the path of a manifest.json", path=where)
        if st.st_size > MAX_MANIFEST_BYTES:
            raise ManifestError(f"{where}: {st.st_size} bytes, over the {MAX_MANIFEST_BYTES}-byte limit", path=where)
        committed = parse_committed(Path(against).read_bytes(), where)
    except (OSError, ValueError, ManifestError) as exc:
        return [Problem(where, "manifest", f"committed manifest unusable: {exc}")]
    return _compare(manifest, committed)


def parse_committed(raw: bytes, where: str) -> dict[str, Any]:
    """A committed manifest's content, validated like a dataset's (its seal is not required to
    match: a committed copy may have been reformatted)."""
    try:
        data = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, RecursionError, ValueError) as exc:
        raise ManifestError(f"{where}: not valid JSON ({exc})", path=where) from None
    return validate(data, where)
