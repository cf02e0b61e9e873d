"""Datasets behind a filesystem URI (``s3://``, ``gs://``, ``hdfs://``, ``file://``, ...).

A build to a URI runs in a local work directory exactly as a local build, then publishes the
finished dataset by upload, since object stores have no rename:

1. check which listed files the destination already holds (same size and content hash);
2. unless all of them and the manifest itself are already there: delete the destination's
   manifest (it stops being a complete dataset), upload every other listed file in large
   blocks and check its size, then upload the manifest last;
3. delete files under ``shards/`` and ``docs/`` that the new manifest does not list.

A publish cut short leaves no manifest; running it again uploads only what is missing or
different. The lock of a build covers the local work directory only.

Opening a dataset at a URI reverses the publish (:func:`fetch_remote`): a local copy, each
download checked against the manifest's size and hash, the manifest written last.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING, Any, Final

import pyarrow as pa

from seqpipe import filesystem
from seqpipe._hashing import BLOCK, hash_bytes, hash_file
from seqpipe.errors import DatasetError, ManifestError, RecipeError, SourceMissingError, UnsafePathError
from seqpipe.formats import OPTIONAL_TOP
from seqpipe.manifest import MANIFEST_NAME, MAX_MANIFEST_BYTES, check_relative, parse_manifest
from seqpipe.progress import bar
from seqpipe.verify import Problem, check_local_file, listed_files

if TYPE_CHECKING:
    import pyarrow.fs as pafs

DATA_DIRS: Final = ("docs", "shards")  # the folders that hold listed files only


@dataclass(frozen=True, slots=True)
class RemoteDir:
    """A dataset directory behind a URI: the URI, its filesystem, and that filesystem's path for it."""

    uri: str
    filesystem: pafs.FileSystem
    root: str

    def inner(self, rel: str) -> str:
        """The filesystem's path of ``rel`` (relative to the dataset directory)."""
        return filesystem.dir_prefix(self.root) + rel

    def child(self, rel: str) -> str:
        """The URI of ``rel``."""
        return f"{self.uri}/{rel}"

    def relative(self, inner: str) -> str | None:
        """``inner`` relative to the dataset directory, or None when it lies elsewhere."""
        prefix = filesystem.dir_prefix(self.root)
        return inner[len(prefix) :] if inner.startswith(prefix) else None


@dataclass(frozen=True, slots=True)
class PublishStats:
    """What one publish did: files uploaded (with their bytes), found in place, and deleted."""

    uploaded: int
    uploaded_bytes: int
    reused: int
    deleted: int


def open_remote(uri: str, *, key: str = "out") -> RemoteDir:
    """The dataset directory ``uri`` names; RecipeError (naming ``key``) when pyarrow cannot use it."""
    try:
        parsed = filesystem.parse_uri(uri)
        mount = filesystem.mount(parsed, uri)
    except RecipeError as exc:
        raise RecipeError(key, exc.reason) from exc
    path = parsed.path.strip("/")
    shown = parsed.child(path) if path else parsed.base
    return RemoteDir(shown, mount.filesystem, filesystem.root_of(mount.inner(path)))


def default_work_dir(remote: RemoteDir, cache_dir: str | Path | None = None) -> Path:
    """Where a build to ``remote`` runs: ``cache_dir/remote/<key>`` when a cache is given, else
    ``$XDG_CACHE_HOME/seqpipe/remote/<key>`` (``~/.cache`` when unset); ``key`` is the first 16
    hex digits of the URI's XXH3-128."""
    if cache_dir is not None:
        return Path(cache_dir) / "remote" / _uri_key(remote)
    return _user_cache() / "remote" / _uri_key(remote)


def default_copy_dir(remote: RemoteDir) -> Path:
    """Where :func:`fetch_remote` keeps a local copy of ``remote`` by default:
    ``$XDG_CACHE_HOME/seqpipe/copies/<key>`` (``~/.cache`` when unset), key as above."""
    return _user_cache() / "copies" / _uri_key(remote)


def _uri_key(remote: RemoteDir) -> str:
    return hash_bytes(remote.uri.encode("utf-8"))[:16]


def _user_cache() -> Path:
    xdg = os.environ.get("XDG_CACHE_HOME", "")
    return (Path(xdg) if os.path.isabs(xdg) else Path.home() / ".cache") / "seqpipe"


def _fail(remote: RemoteDir, rel: str, what: str, exc: BaseException) -> DatasetError:
    return DatasetError(f"{remote.child(rel)}: {what}: {exc}", path=remote.child(rel))


def _info(remote: RemoteDir, rel: str) -> pafs.FileInfo:
    try:
        info: pafs.FileInfo = remote.filesystem.get_file_info(remote.inner(rel))
    except (OSError, pa.ArrowException) as exc:
        raise _fail(remote, rel, "cannot stat on the filesystem", exc) from exc
    return info


def _is_file(info: pafs.FileInfo) -> bool:
    return bool(info.type == filesystem.pyarrow_fs().FileType.File)


def _files_under(remote: RemoteDir, rel: str) -> list[str]:
    """Every file below ``rel`` (recursively), relative to the dataset directory, sorted."""
    selector = filesystem.pyarrow_fs().FileSelector(
        remote.inner(rel) if rel else remote.root, recursive=True, allow_not_found=True
    )
    try:
        infos = remote.filesystem.get_file_info(selector)
    except (OSError, pa.ArrowException) as exc:
        raise _fail(remote, rel, "cannot list on the filesystem", exc) from exc
    found = (remote.relative(i.path) for i in infos if _is_file(i))
    return sorted(r for r in found if r)


def _upload(remote: RemoteDir, local: Path, rel: str) -> None:
    """Copy the local file ``local`` to ``rel``, ``BLOCK`` bytes per write, never compressed."""
    buf = bytearray(BLOCK)
    view = memoryview(buf)
    try:
        with (
            open(local, "rb", buffering=0) as src,
            remote.filesystem.open_output_stream(remote.inner(rel), compression=None) as sink,
        ):
            while n := src.readinto(buf):
                sink.write(view[:n])
    except (OSError, pa.ArrowException) as exc:
        raise _fail(remote, rel, "upload failed", exc) from exc


def _check_size(remote: RemoteDir, rel: str, size: int) -> None:
    info = _info(remote, rel)
    if not _is_file(info) or info.size != size:
        got = info.size if _is_file(info) else info.type.name.lower()
        raise DatasetError(
            f"{remote.child(rel)}: uploaded {size} bytes, the filesystem reports {got}", path=remote.child(rel)
        )


def _read(remote: RemoteDir, rel: str, limit: int) -> bytes | None:
    """The bytes of ``rel``, None when there is no such file; ManifestError when over ``limit``."""
    info = _info(remote, rel)
    if not _is_file(info):
        return None
    if info.size is not None and info.size > limit:
        raise ManifestError(
            f"{remote.child(rel)}: manifest is {info.size} bytes, over the {limit}-byte limit", path=remote.child(rel)
        )
    try:
        with remote.filesystem.open_input_stream(remote.inner(rel), compression=None) as stream:
            raw: bytes = stream.read(limit + 1)
    except FileNotFoundError:
        return None
    except (OSError, pa.ArrowException) as exc:
        raise _fail(remote, rel, "cannot read", exc) from exc
    if len(raw) > limit:
        raise ManifestError(f"{remote.child(rel)}: manifest is over the {limit}-byte limit", path=remote.child(rel))
    return raw


def publish_remote(local: Path, remote: RemoteDir, manifest: dict[str, Any], *, show: bool = False) -> PublishStats:
    """Upload the complete local dataset ``local`` (whose manifest is ``manifest``) to ``remote``."""
    entries = listed_files(manifest)
    for e in entries:
        check_relative(e["path"])
    new_manifest = (local / MANIFEST_NAME).read_bytes()
    todo = [e for e in entries if check_remote_file(remote, e)[1] is not None]  # not there as listed
    listed = {e["path"] for e in entries}
    uploaded_bytes = 0
    manifest_sent = False
    if todo or _read(remote, MANIFEST_NAME, MAX_MANIFEST_BYTES) != new_manifest:
        if _is_file(_info(remote, MANIFEST_NAME)):
            try:
                remote.filesystem.delete_file(remote.inner(MANIFEST_NAME))
            except (OSError, pa.ArrowException) as exc:
                raise _fail(remote, MANIFEST_NAME, "cannot delete the old manifest", exc) from exc
        parents = sorted({str(PurePosixPath(e["path"]).parent) for e in todo} - {"."})
        try:
            if remote.root not in ("", "/"):
                remote.filesystem.create_dir(remote.root, recursive=True)
            for parent in parents:
                remote.filesystem.create_dir(remote.inner(parent), recursive=True)
        except (OSError, pa.ArrowException) as exc:
            raise _fail(remote, "", "cannot create directories", exc) from exc
        with bar(
            sum(e["bytes"] for e in todo), "publishing", unit="B", show=show and bool(todo), unit_scale=True
        ) as pbar:
            for e in todo:
                _upload(remote, local / e["path"], e["path"])
                _check_size(remote, e["path"], e["bytes"])
                uploaded_bytes += e["bytes"]
                pbar.update(e["bytes"])
        _upload(remote, local / MANIFEST_NAME, MANIFEST_NAME)
        _check_size(remote, MANIFEST_NAME, len(new_manifest))
        manifest_sent = True
    stale = [r for d in DATA_DIRS for r in _files_under(remote, d) if r not in listed]
    stale += [name for name in OPTIONAL_TOP if name not in listed and _is_file(_info(remote, name))]
    for rel in stale:
        try:
            remote.filesystem.delete_file(remote.inner(rel))
        except FileNotFoundError:
            pass
        except (OSError, pa.ArrowException) as exc:
            raise _fail(remote, rel, "cannot delete an unlisted file", exc) from exc
    return PublishStats(len(todo) + manifest_sent, uploaded_bytes, len(entries) - len(todo), len(stale))


# -- verification ------------------------------------------------------------------------------


def read_remote_manifest(remote: RemoteDir) -> tuple[bytes, dict[str, Any]]:
    """The manifest's bytes and its parsed, validated content."""
    raw = _read(remote, MANIFEST_NAME, MAX_MANIFEST_BYTES)
    where = remote.child(MANIFEST_NAME)
    if raw is None:
        raise ManifestError(
            f"{where}: no manifest; this is not a complete seqpipe dataset (an interrupted "
            "build or publish leaves none: run it again)",
            path=where,
        )
    return raw, parse_manifest(raw, where)


def check_remote_file(remote: RemoteDir, entry: dict[str, Any]) -> tuple[int, Problem | None]:
    """Bytes read and the problem (if any) with one listed file."""
    rel = entry["path"]
    try:
        check_relative(rel)
    except UnsafePathError as exc:
        return 0, Problem(rel, "unsafe", str(exc))
    info = _info(remote, rel)
    if not _is_file(info):
        return 0, Problem(rel, "missing", "listed in the manifest but not on the filesystem")
    size = int(info.size or 0)
    if size != entry["bytes"]:
        kind = "truncated" if size < entry["bytes"] else "corrupt"
        return size, Problem(rel, kind, f"{size} bytes on the filesystem, manifest says {entry['bytes']}")
    try:
        digest = hash_file(remote.child(rel))
    except SourceMissingError:
        return 0, Problem(rel, "missing", "listed in the manifest but not on the filesystem")
    if digest != entry["hash"]:
        return size, Problem(rel, "corrupt", f"content hash {digest}, manifest says {entry['hash']}")
    return size, None


def remote_unlisted(remote: RemoteDir, listed: set[str], top_level_ok: set[str]) -> list[Problem]:
    """Files the manifest does not list: top-level entries by name, files in docs/ and shards/ by path."""
    problems = []
    tops: set[str] = set()
    for rel in _files_under(remote, ""):
        top = rel.split("/", 1)[0]
        if top in DATA_DIRS:
            if rel not in listed:
                problems.append(Problem(rel, "unlisted", "file in a dataset folder that the manifest does not list"))
        elif top not in top_level_ok and rel not in listed:
            tops.add(top)
    problems += [Problem(top, "unlisted", "not part of the dataset (not in the manifest)") for top in tops]
    return sorted(problems, key=lambda p: (p.path.split("/", 1)[0] in DATA_DIRS, p.path))


# -- reading: a local copy to train from -----------------------------------------------------------


def _download(remote: RemoteDir, rel: str, dest: Path) -> None:
    """Copy ``rel`` to the local file ``dest`` through a temporary name (never a torn file)."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(f".{dest.name}.{os.getpid()}.tmp")
    try:
        with remote.filesystem.open_input_stream(remote.inner(rel), compression=None) as src, open(tmp, "wb") as sink:
            while chunk := src.read(BLOCK):
                sink.write(chunk)
        os.replace(tmp, dest)
    except FileNotFoundError as exc:
        raise _fail(remote, rel, "listed in the manifest but not on the filesystem", exc) from exc
    except (OSError, pa.ArrowException) as exc:
        raise _fail(remote, rel, "download failed", exc) from exc
    finally:
        tmp.unlink(missing_ok=True)


def fetch_remote(remote: RemoteDir, local: Path, *, show: bool = False) -> PublishStats:
    """Make ``local`` a complete copy of the dataset at ``remote``, the publish in reverse:
    download each listed file the copy lacks or holds with another size or hash, check each
    download's size and hash, delete copied files the manifest does not list, and write the
    manifest last. The copy's manifest is removed before anything changes, so an interrupted
    fetch leaves no manifest, and the next one downloads only what is still missing.
    """
    raw, manifest = read_remote_manifest(remote)
    entries = listed_files(manifest)
    for e in entries:
        check_relative(e["path"])
    local.mkdir(parents=True, exist_ok=True)
    mine = local / MANIFEST_NAME
    todo = [e for e in entries if check_local_file(local, e)[1] is not None]  # not in the copy as listed
    listed = {e["path"] for e in entries}
    stale = [
        p
        for d in DATA_DIRS
        if (local / d).is_dir()
        for p in sorted((local / d).rglob("*"))
        if p.is_file() and p.relative_to(local).as_posix() not in listed
    ]
    stale += [local / name for name in OPTIONAL_TOP if name not in listed and (local / name).is_file()]
    if todo or stale or not (mine.is_file() and mine.read_bytes() == raw):
        mine.unlink(missing_ok=True)
        with bar(
            sum(e["bytes"] for e in todo), "fetching", unit="B", show=show and bool(todo), unit_scale=True
        ) as pbar:
            for e in todo:
                dest = local / e["path"]
                _download(remote, e["path"], dest)
                if check_local_file(local, e)[1] is not None:
                    dest.unlink(missing_ok=True)
                    raise DatasetError(
                        f"{remote.child(e['path'])}: downloaded bytes differ from the manifest's "
                        "size and hash (seqpipe verify on the URI shows what is wrong)",
                        path=remote.child(e["path"]),
                    )
                pbar.update(e["bytes"])
        for p in stale:
            p.unlink()
        tmp = mine.with_name(f".{MANIFEST_NAME}.{os.getpid()}.tmp")
        tmp.write_bytes(raw)
        os.replace(tmp, mine)
    return PublishStats(len(todo), sum(e["bytes"] for e in todo), len(entries) - len(todo), len(stale))
