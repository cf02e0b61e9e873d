"""Copying a whole dataset between two stores: publishing a build to a filesystem URI, and
fetching a dataset at a URI to a local copy (``s3://``, ``gs://``, ``hdfs://``, ``file://``, ...).

A build to a URI runs in a local work directory exactly as a local build, then publishes the
finished dataset by upload, since object stores have no rename. Both directions are one
procedure over :class:`seqpipe.storage.Store` (:func:`_sync`):

1. check which listed files the destination already holds, with verify's own per-file check
   (same size and content hash; paths the destination refuses stop the copy);
2. unless all of them and the manifest itself are already there: delete the destination's
   manifest (it stops being a complete dataset), copy every other listed file (a store without
   rename checks each size after the write; a fetched file is also hashed, since the remote
   bytes are not trusted), then write the manifest last;
3. delete files under ``shards/`` and ``documents/`` (and optional top-level files) that the
   manifest does not list.

A copy cut short leaves no manifest; running it again copies only what is missing or
different. The lock of a build covers the local work directory only.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from seqpipe._hashing import hash_bytes
from seqpipe._verify import DATA_DIRS, check_file, check_files, listed_files
from seqpipe.errors import DatasetError, ManifestError
from seqpipe.formats import OPTIONAL_TOP
from seqpipe.manifest import MANIFEST_NAME, parse_manifest
from seqpipe.progress import bar
from seqpipe.storage import LocalStore, Store, UriStore


@dataclass(frozen=True, slots=True)
class PublishStats:
    """What one copy did: files copied (with their bytes; a publish counts the manifest among
    them), found in place, and deleted."""

    uploaded: int
    uploaded_bytes: int
    reused: int
    deleted: int


def open_remote(uri: str, *, key: str = "out") -> UriStore:
    """The dataset directory ``uri`` names; RecipeError (naming ``key``) when pyarrow cannot use it."""
    return UriStore(uri, key=key)


def default_work_dir(remote: Store, cache_dir: str | Path | None = None) -> Path:
    """Where a build to ``remote`` runs: ``cache_dir/remote/<key>`` when a cache is given, else
    ``$XDG_CACHE_HOME/seqpipe/remote/<key>`` (``~/.cache`` when unset); ``key`` is the first 16
    hex digits of the URI's XXH3-128."""
    if cache_dir is not None:
        return Path(cache_dir) / "remote" / _uri_key(remote)
    return _user_cache() / "remote" / _uri_key(remote)


def default_copy_dir(remote: Store) -> Path:
    """Where :func:`fetch_remote` keeps a local copy of ``remote`` by default:
    ``$XDG_CACHE_HOME/seqpipe/copies/<key>`` (``~/.cache`` when unset), key as above."""
    return _user_cache() / "copies" / _uri_key(remote)


def _uri_key(remote: Store) -> str:
    return hash_bytes(remote.location.encode("utf-8"))[:16]


def _user_cache() -> Path:
    xdg = os.environ.get("XDG_CACHE_HOME", "")
    return (Path(xdg) if os.path.isabs(xdg) else Path.home() / ".cache") / "seqpipe"


def publish_remote(local: Path, remote: Store, manifest: dict[str, Any], *, show: bool = False) -> PublishStats:
    """Upload the complete local dataset ``local`` (whose manifest is ``manifest``) to ``remote``."""
    src = LocalStore(local)
    stats, manifest_sent = _sync(src, remote, src.read_manifest(), manifest, fetching=False, show=show)
    return PublishStats(stats.uploaded + manifest_sent, stats.uploaded_bytes, stats.reused, stats.deleted)


def fetch_remote(remote: Store, local: Path, *, show: bool = False) -> PublishStats:
    """Make ``local`` a complete copy of the dataset at ``remote``, the publish in reverse: each
    download is checked against the manifest's size and hash (a damaged remote file is refused
    and not kept), and the copy's manifest is written last."""
    raw = remote.read_manifest()
    manifest = parse_manifest(raw, remote.where(MANIFEST_NAME))
    local.mkdir(parents=True, exist_ok=True)
    stats, _ = _sync(remote, LocalStore(local), raw, manifest, fetching=True, show=show)
    return stats


def _upload(remote: Store, local: Store, rel: str) -> None:
    """Copy ``rel`` from the local dataset to ``remote`` (one call per file; tests count them)."""
    with local.open(rel) as stream:
        remote.write(rel, stream)


def _download(remote: Store, rel: str, local: Store) -> None:
    """Copy ``rel`` from ``remote`` to the local copy (one call per file; tests count them)."""
    with remote.open(rel) as stream:
        local.write(rel, stream)


def _sync(
    src: Store, dst: Store, raw: bytes, manifest: dict[str, Any], *, fetching: bool, show: bool
) -> tuple[PublishStats, bool]:
    """Make ``dst`` hold the dataset ``src`` holds (manifest bytes ``raw``, parsed ``manifest``):
    the files copied, reused and deleted, and whether the manifest was written."""
    entries = listed_files(manifest)
    for e in entries:
        dst.check_path(e["path"])  # before anything is written: UnsafePathError
    todo = [e for e, (_, problem) in zip(entries, check_files(dst, entries), strict=True) if problem is not None]
    listed = {e["path"] for e in entries}
    changed = bool(todo) or _manifest_of(dst) != raw
    if changed:
        dst.delete(MANIFEST_NAME, missing_ok=True)
        _copy_all(src, dst, todo, fetching=fetching, show=show)
        if fetching:  # the bytes parsed above, not a second read that a publish may have changed
            dst.write_bytes(MANIFEST_NAME, raw)
        else:
            _upload(dst, src, MANIFEST_NAME)
    stale = [r for d in DATA_DIRS for r in dst.list_files(d) if r not in listed]
    stale += [name for name in OPTIONAL_TOP if name not in listed and _is_file(dst, name)]
    for rel in stale:
        dst.delete(rel, missing_ok=True)
    copied = sum(e["bytes"] for e in todo)
    return PublishStats(len(todo), copied, len(entries) - len(todo), len(stale)), changed


def _copy_all(src: Store, dst: Store, todo: list[dict[str, Any]], *, fetching: bool, show: bool) -> None:
    """Copy each listed file in ``todo``; a fetched one must then pass verify's check."""
    total = sum(e["bytes"] for e in todo)
    label = "fetching" if fetching else "publishing"
    with bar(total, label, unit="B", show=show and bool(todo), unit_scale=True) as pbar:
        for e in todo:
            if not fetching:
                _upload(dst, src, e["path"])
            else:
                _download(src, e["path"], dst)
                if check_file(dst, e)[1] is not None:
                    dst.delete(e["path"], missing_ok=True)
                    raise DatasetError(
                        f"{src.where(e['path'])}: downloaded bytes differ from the manifest's "
                        "size and hash (seqpipe verify on the URI shows what is wrong)",
                        path=src.where(e["path"]),
                    )
            pbar.update(e["bytes"])


def _manifest_of(store: Store) -> bytes | None:
    """The manifest ``store`` holds, None when it has none or one that cannot be used."""
    try:
        return store.read_manifest()
    except ManifestError:
        return None


def _is_file(store: Store, rel: str) -> bool:
    st = store.stat(rel)
    return st is not None and st.is_file
