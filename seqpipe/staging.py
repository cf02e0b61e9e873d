"""The output directory's private area: lock, staging, cache, and the atomic publish.

Layout under the dataset directory::

    .seqpipe/lock                 {"pid": ..., "host": ...} of the build holding it (flock)
    .seqpipe/publishing.json      the entries a publish may replace, while one is under way
    .seqpipe/stage/<build key>/   everything a build writes before it publishes
    .seqpipe/cache/               ingested parts, reusable by later builds
    .seqpipe/cache/inputs.json    input file hashes by path, with the (size, mtime, inode) they were taken at
    .seqpipe/cache/plans.json     cuts of inputs that needed reading to cut, by content hash
    .seqpipe/cache/plan.json      the last build's whole plan, taken while its inputs' listing is unchanged
    .seqpipe/cache/counts.arrow   the last build's corpus counts, taken while its parts and splits are unchanged
    .seqpipe/cache/inputs.text    the last build's inputs as manifest text, taken while they are unchanged

A build writes only into a new or empty directory or over an earlier seqpipe dataset: it may
replace what that dataset's manifest lists, nothing else (``check_output``).

Publishing: record which entries it will replace, delete the old manifest (the directory stops
being a complete dataset) before anything it lists changes, move each old entry aside and each
staged one into place, fsync, then rename the new manifest in last. A build killed anywhere
leaves either the old complete dataset or none.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import socket
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any, Final

from seqpipe.errors import BuildLockedError, DatasetError
from seqpipe.formats import PRIVATE
from seqpipe.manifest import MANIFEST_NAME
from seqpipe.shards import fsync_dir

PUBLISHING: Final = "publishing.json"
_HOLDER_READS: Final = 100  # times 10 ms: how long a refused build waits for the holder's PID
# manifest sections whose paths are not files of the dataset directory
_NOT_DATASET_PATHS: Final = ("inputs", "recipe")


def private_dir(out: Path) -> Path:
    return out / PRIVATE


def _listed_paths(node: Any, into: set[str]) -> None:
    """The first component of every relative ``path`` under ``node`` (a manifest's JSON)."""
    if isinstance(node, dict):
        for key, value in node.items():
            if key in _NOT_DATASET_PATHS:
                continue
            if key == "path" and isinstance(value, str):
                head = value.split("/", 1)[0]
                if head not in ("", ".", "..") and not os.path.isabs(value):
                    into.add(head)
            else:
                _listed_paths(value, into)
    elif isinstance(node, (list, tuple)):  # (a manifest built in memory may hold tuples)
        for value in node:
            _listed_paths(value, into)


def owned_entries(out: Path) -> set[str] | None:
    """The top-level names of ``out`` an earlier seqpipe build put there: its manifest and what
    the manifest lists, plus what an interrupted publish recorded; None when ``out`` holds a
    ``manifest.json`` that is not a seqpipe manifest."""
    owned: set[str] = set()
    with suppress(OSError, ValueError, TypeError):
        owned.update(json.loads((private_dir(out) / PUBLISHING).read_text()))
    manifest = out / MANIFEST_NAME
    if not manifest.exists() and not manifest.is_symlink():
        return owned
    listed = _manifest_entries(manifest)
    return None if listed is None else owned | listed | {MANIFEST_NAME}


_LISTED: dict[str, tuple[tuple[int, int, int], frozenset[str] | None]] = {}  # manifest path -> (stamp, entries)


def _manifest_entries(manifest: Path) -> frozenset[str] | None:
    """The top-level names ``manifest`` lists (None: not a seqpipe manifest), remembered by its
    size, mtime and inode: a build asks before it starts and again when it publishes, and a
    manifest listing many inputs is a large document to parse twice."""
    try:
        st = os.stat(manifest)
        stamp = (st.st_size, st.st_mtime_ns, st.st_ino)
        known = _LISTED.get(str(manifest))
        if known is not None and known[0] == stamp:
            return known[1]
        data = json.loads(manifest.read_text())
    except (OSError, ValueError):
        return None
    return _remember(manifest, stamp, data)


def _remember(manifest: Path, stamp: tuple[int, int, int], data: Any) -> frozenset[str] | None:
    """The entries ``data`` (a manifest's JSON) lists, remembered for ``manifest`` at ``stamp``."""
    into: set[str] = set()
    listed: frozenset[str] | None = None
    if isinstance(data, dict) and str(data.get("format", "")).startswith("seqpipe"):
        _listed_paths(data, into)
        listed = frozenset(into)
    _LISTED.clear()  # one manifest remembered: builds go one output at a time
    _LISTED[str(manifest)] = (stamp, listed)
    return listed


def remember_published(out: Path, manifest: dict[str, Any], manifest_name: str = MANIFEST_NAME) -> None:
    """Remember the entries of the manifest this process just published in ``out`` (its JSON as
    written), so the next build into ``out`` in this process need not read it back to know them."""
    path = out / manifest_name
    with suppress(OSError):
        st = os.stat(path)
        _remember(path, (st.st_size, st.st_mtime_ns, st.st_ino), manifest)


def check_output(out: Path, also: Sequence[str] = ()) -> None:
    """Refuse to build into ``out`` unless it is new, empty, or holds only an earlier seqpipe
    dataset (what its manifest lists), seqpipe's private area and the names in ``also`` (a
    parts cache the caller keeps inside ``out``)."""
    if not out.exists() and not out.is_symlink():
        return
    if not out.is_dir():
        raise DatasetError(f"{out}: exists and is not a directory; choose another output directory")
    present = {p.name for p in out.iterdir()} - {PRIVATE, *also}
    owned = owned_entries(out)
    if owned is None:
        raise DatasetError(
            f"{out}: its {MANIFEST_NAME} is not a seqpipe manifest; a build replaces only an earlier "
            "seqpipe dataset: choose a new or empty output directory"
        )
    foreign = sorted(present - owned)
    if foreign:
        shown = ", ".join(foreign[:5]) + (f" and {len(foreign) - 5} more" if len(foreign) > 5 else "")
        raise DatasetError(
            f"{out}: holds {shown}, which no seqpipe manifest there lists; a build writes only into a "
            "new or empty directory or over an earlier seqpipe dataset: choose another output "
            "directory or move those away"
        )


def _holder(fd: int) -> dict[str, Any]:
    """What the lock file says about its holder; the holder writes it right after locking, so
    an empty file is read again for a moment (empty if it stays so)."""
    for _ in range(_HOLDER_READS):
        try:
            held = json.loads(os.pread(fd, 4096, 0) or b"null")
        except (OSError, ValueError):
            held = None
        if isinstance(held, dict):
            return held
        time.sleep(0.01)
    return {}


def _take_lock(lock: Path, out: Path) -> int:
    """An open descriptor of ``lock`` holding its exclusive flock; BuildLockedError if held."""
    while True:
        fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            held = _holder(fd)
            os.close(fd)
            raise BuildLockedError(
                f"{out}: another build is running (lock {lock} held by pid {held.get('pid')} on "
                f"{held.get('host')}); wait for it to finish",
                path=str(lock),
            ) from None
        # the previous holder removes the file before unlocking: if it did so after we opened
        # it, we hold a file nobody else will open, so start again with the current one
        try:
            if os.stat(lock).st_ino == os.fstat(fd).st_ino:
                return fd
        except FileNotFoundError:
            pass
        os.close(fd)


@contextmanager
def build_lock(out: Path) -> Iterator[Path]:
    """Hold ``out/.seqpipe/lock`` for the duration; fail at once if another build holds it.

    The lock is a kernel ``flock`` on the open file, so it ends with the process however that
    dies; the file only carries the holder's PID and host for the message."""
    priv = private_dir(out)
    priv.mkdir(parents=True, exist_ok=True)
    lock = priv / "lock"
    fd = _take_lock(lock, out)
    try:
        os.ftruncate(fd, 0)
        os.write(fd, json.dumps({"pid": os.getpid(), "host": socket.gethostname()}).encode())
        yield lock
    finally:
        lock.unlink(missing_ok=True)  # before unlocking, so a waiting taker sees the name gone
        os.close(fd)


def publish(out: Path, stage: Path, entries: Sequence[str], manifest_name: str) -> None:
    """Move staged ``entries`` (files or directories) into ``out``, the manifest last; every
    entry the old manifest listed and the new one does not is removed too, but only once the
    old manifest is gone."""
    replaced = sorted((owned_entries(out) or set()) - {manifest_name} | set(entries))
    _write_record(private_dir(out) / PUBLISHING, replaced)
    manifest = out / manifest_name
    if manifest.exists():
        manifest.unlink()
        fsync_dir(out)
    trash = private_dir(out) / "trash"
    shutil.rmtree(trash, ignore_errors=True)
    trash.mkdir(parents=True, exist_ok=True)
    for name in replaced:
        dst = out / name
        if dst.exists() or dst.is_symlink():
            os.rename(dst, trash / name.replace("/", "_"))
        if name in entries:
            dst.parent.mkdir(parents=True, exist_ok=True)
            os.rename(stage / name, dst)
    fsync_dir(out)
    os.rename(stage / manifest_name, manifest)
    fsync_dir(out)
    (private_dir(out) / PUBLISHING).unlink(missing_ok=True)
    shutil.rmtree(trash, ignore_errors=True)


def _write_record(path: Path, names: Sequence[str]) -> None:
    """Durably note which entries a publish may replace, so a build re-run after a kill
    mid-publish still knows they are seqpipe's."""
    tmp = path.with_suffix(".tmp")
    with open(tmp, "w") as fh:
        fh.write(json.dumps(list(names)))
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    fsync_dir(path.parent)
