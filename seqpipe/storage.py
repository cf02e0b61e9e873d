"""Where a dataset's files live, behind one interface: a local directory or a filesystem URI.

A :class:`Store` holds one dataset's files under one root and names each by its path relative
to that root (POSIX, ``""`` for the root itself). Verify, publish and fetch are written once
over this interface; the two stores differ only here:

- :class:`LocalStore` works on a local directory with the calls seqpipe always made (``os``,
  memory-mapped hashing, a temporary name renamed into place), and its path rule also
  resolves symlinks, which must stay inside the directory.
- :class:`UriStore` works on any filesystem ``pyarrow.fs`` reaches by URI (``s3://``,
  ``gs://``, ``file://``, a test's in-memory one), through :mod:`seqpipe.filesystem`. Object
  stores have no rename, so a write uploads in place and then checks the size the store
  reports; a reader must not trust a file before a manifest lists it (see
  :mod:`seqpipe.transfer`).

Every failure is one of ours: a missing file is a :class:`ShardMissingError`, a manifest that is
missing or too large a :class:`ManifestError`, any other failure a :class:`DatasetError`
naming the file, and a path leaving the store an :class:`UnsafePathError`.
"""

from __future__ import annotations

import io
import os
import threading
from abc import ABC, abstractmethod
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from stat import S_ISREG
from typing import IO, TYPE_CHECKING, Any, Final

import pyarrow as pa

from seqpipe import filesystem
from seqpipe._hashing import BLOCK, hash_file, hash_stream
from seqpipe.errors import DatasetError, ManifestError, RecipeError, ShardMissingError
from seqpipe.manifest import MANIFEST_NAME, MAX_MANIFEST_BYTES, check_relative, safe_relative

if TYPE_CHECKING:
    import pyarrow.fs as pafs

_CORES: Final = os.cpu_count() or 2


@dataclass(frozen=True, slots=True)
class FileStat:
    """What a store knows about one name: its size, whether it is a regular file, and whether
    the name itself is a symlink (local stores only; a URI store never reports one)."""

    size: int
    is_file: bool
    is_symlink: bool = False


class Store(ABC):
    """One dataset's files wherever they live; every ``rel`` is relative to the store's root."""

    __slots__ = ()

    location: str
    """How messages and reports name the store (a directory or a URI)."""
    read_threads: int
    """How many files verify hashes at once: one per core where hashing is CPU work, more
    where reads wait on the network."""

    def where(self, rel: str) -> str:
        """How messages name ``rel``."""
        return f"{self.location}/{rel}" if rel else self.location

    def check_path(self, rel: str) -> None:
        """Refuse (UnsafePathError) a path that is absolute, climbs out with '..', or holds NUL
        bytes, backslashes or colons; a local store also refuses symlinks leading outside."""
        check_relative(rel)

    @abstractmethod
    def stat(self, rel: str) -> FileStat | None:
        """What is at ``rel`` (following a symlink), or None when nothing is."""

    @abstractmethod
    def open(self, rel: str) -> IO[bytes]:
        """``rel`` opened to read its bytes as stored, from the start; ShardMissingError when absent."""

    @abstractmethod
    def hash(self, rel: str) -> str:
        """XXH3-128 of the bytes of ``rel`` (32 hex digits); ShardMissingError when absent."""

    @abstractmethod
    def list_dir(self, rel: str = "") -> list[str]:
        """Names directly inside the folder ``rel`` (files and folders), sorted; [] when it is not a folder."""

    @abstractmethod
    def list_files(self, rel: str = "") -> list[str]:
        """Every file below the folder ``rel`` (recursively) as a path relative to the root,
        sorted; [] when ``rel`` is not a folder. A local store does not descend into
        symlinked folders below ``rel``."""

    def stray_folders(self, rel: str = "") -> list[tuple[str, str]]:
        """Folders below ``rel`` that hold no file to list: ``(path, why)`` for each empty folder
        and each symlink to a folder (which :meth:`list_files` does not enter). A store that
        cannot tell returns what it can."""
        return []

    @abstractmethod
    def write(self, rel: str, source: IO[bytes]) -> int:
        """Store the bytes left in ``source`` as ``rel`` (parent folders made as needed) and
        return their count. Never leaves a torn file where the store can rename; elsewhere the
        stored size is checked after the write."""

    @abstractmethod
    def delete(self, rel: str, *, missing_ok: bool = False) -> None:
        """Remove the file ``rel``; ShardMissingError when it is absent, unless ``missing_ok``."""

    def read_manifest(self) -> bytes:
        """The manifest's bytes; ManifestError when there is none or it is over the size limit."""
        where = self.where(MANIFEST_NAME)
        st = self.stat(MANIFEST_NAME)
        if st is None or not st.is_file:
            raise ManifestError(
                f"{where}: no manifest; this is not a complete seqpipe dataset (an interrupted "
                "build or publish leaves none: run it again)",
                path=where,
            )
        if st.size > MAX_MANIFEST_BYTES:
            raise ManifestError(
                f"{where}: manifest is {st.size} bytes, over the {MAX_MANIFEST_BYTES}-byte limit", path=where
            )
        try:
            with self.open(MANIFEST_NAME) as stream:
                raw = stream.read(MAX_MANIFEST_BYTES + 1)
        except ShardMissingError as exc:
            raise ManifestError(f"{where}: no manifest (it was removed while being read)", path=where) from exc
        if len(raw) > MAX_MANIFEST_BYTES:
            raise ManifestError(f"{where}: manifest is over the {MAX_MANIFEST_BYTES}-byte limit", path=where)
        return bytes(raw)

    def write_bytes(self, rel: str, data: bytes) -> None:
        """Store ``data`` as ``rel``, as :meth:`write` does."""
        self.write(rel, io.BytesIO(data))

    def _missing(self, rel: str, exc: BaseException | None = None) -> ShardMissingError:
        detail = f" ({exc})" if exc is not None else ""
        return ShardMissingError(f"{self.where(rel)}: no such file in the dataset{detail}", path=self.where(rel))

    def _failed(self, rel: str, what: str, exc: BaseException) -> DatasetError:
        return DatasetError(f"{self.where(rel)}: {what}: {exc}", path=self.where(rel))


def open_store(location: str | Path | Store, *, key: str = "directory") -> Store:
    """The store ``location`` names: a URI store for a ``str`` with ``scheme://``, else a local one
    (a Store is returned as it is); RecipeError naming ``key`` when pyarrow cannot use the URI."""
    if isinstance(location, Store):
        return location
    if filesystem.is_uri(location):
        return UriStore(str(location), key=key)
    return LocalStore(location)


class LocalStore(Store):
    """A dataset in a local directory."""

    __slots__ = ("directory", "location", "read_threads")

    def __init__(self, directory: str | Path) -> None:
        self.directory = Path(directory)
        self.location = str(self.directory)
        # hashing a memory-mapped file is CPU work: one thread per core
        self.read_threads = _CORES

    def __repr__(self) -> str:
        return f"LocalStore({self.location!r})"

    def path(self, rel: str) -> Path:
        """The local path of ``rel`` (not checked: see :meth:`check_path`)."""
        return self.directory.joinpath(*PurePosixPath(rel).parts) if rel else self.directory

    def check_path(self, rel: str) -> None:
        safe_relative(self.directory, rel)

    def read_manifest(self) -> bytes:
        if not self.directory.is_dir():
            raise ManifestError(
                f"{self.location}: not a directory (expected a dataset written by 'seqpipe build')",
                path=self.location,
            )
        return super().read_manifest()

    def stat(self, rel: str) -> FileStat | None:
        path = self.path(rel)
        try:
            link = path.is_symlink()
            st = path.stat()
        except (FileNotFoundError, NotADirectoryError):
            return FileStat(0, False, True) if path.is_symlink() else None  # a dangling link
        except (OSError, ValueError) as exc:
            raise self._failed(rel, "cannot stat", exc) from exc
        return FileStat(st.st_size, S_ISREG(st.st_mode), link)

    def open(self, rel: str) -> IO[bytes]:
        try:
            return open(self.path(rel), "rb")
        except (FileNotFoundError, NotADirectoryError) as exc:
            raise self._missing(rel) from exc
        except (OSError, ValueError) as exc:
            raise self._failed(rel, "cannot open", exc) from exc

    def hash(self, rel: str) -> str:
        try:
            return hash_file(self.path(rel))
        except (FileNotFoundError, NotADirectoryError) as exc:
            raise self._missing(rel) from exc
        except (OSError, ValueError) as exc:
            raise self._failed(rel, "cannot read to hash", exc) from exc

    def list_dir(self, rel: str = "") -> list[str]:
        try:
            return sorted(os.listdir(self.path(rel)))
        except (FileNotFoundError, NotADirectoryError):
            return []
        except OSError as exc:
            raise self._failed(rel, "cannot list", exc) from exc

    def list_files(self, rel: str = "") -> list[str]:
        top = self.path(rel)
        if not top.is_dir():
            return []
        found = []

        def refuse(exc: OSError) -> None:
            raise self._failed(rel, "cannot list", exc) from exc

        for dirpath, _, filenames in os.walk(top, onerror=refuse):
            base = Path(dirpath).relative_to(self.directory).as_posix()
            found += [name if base == "." else f"{base}/{name}" for name in filenames]
        return sorted(found)

    def stray_folders(self, rel: str = "") -> list[tuple[str, str]]:
        top = self.path(rel)
        if not top.is_dir() or top.is_symlink():
            return []
        found = []
        for dirpath, dirnames, filenames in os.walk(top):
            base = Path(dirpath).relative_to(self.directory).as_posix()
            for name in dirnames:
                if (Path(dirpath) / name).is_symlink():
                    target = os.path.realpath(Path(dirpath) / name)
                    found.append((f"{base}/{name}", f"a symlink to the folder {target}"))
            if not dirnames and not filenames and base != rel:
                found.append((base, "an empty folder"))
        return sorted(found)

    def write(self, rel: str, source: IO[bytes]) -> int:
        dest = self.path(rel)
        # a name no other process or thread writing the same file uses
        tmp = dest.with_name(f".{dest.name}.{os.getpid()}.{threading.get_ident()}.tmp")
        written = 0
        try:
            dest.parent.mkdir(parents=True, exist_ok=True)
            with open(tmp, "wb") as sink:
                while chunk := source.read(BLOCK):
                    sink.write(chunk)
                    written += len(chunk)
            os.replace(tmp, dest)
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot write", exc) from exc
        finally:
            tmp.unlink(missing_ok=True)
        return written

    def delete(self, rel: str, *, missing_ok: bool = False) -> None:
        try:
            self.path(rel).unlink()
        except (FileNotFoundError, NotADirectoryError) as exc:
            if not missing_ok:
                raise self._missing(rel) from exc
        except OSError as exc:
            raise self._failed(rel, "cannot delete", exc) from exc


class UriStore(Store):
    """A dataset behind a filesystem URI, reached through :mod:`seqpipe.filesystem`."""

    __slots__ = ("_local", "_made", "filesystem", "location", "read_threads", "root")

    def __init__(self, uri: str, *, key: str = "uri") -> None:
        """RecipeError naming ``key`` when ``uri`` is not a URI or pyarrow cannot use it."""
        try:
            parsed = filesystem.parse_uri(uri)
            mount = filesystem.mount(parsed, uri)
        except RecipeError as exc:
            raise RecipeError(key, exc.reason) from exc
        path = parsed.path.strip("/")
        self.location = parsed.child(path) if path else parsed.base
        self.filesystem: pafs.FileSystem = mount.filesystem
        self.root = filesystem.root_of(mount.inner(path))
        # reads wait on the network: more threads than cores keep more requests in flight
        self.read_threads = min(8, _CORES * 2)
        self._made: set[str] = set()  # folders this store has created (object stores: one call each)
        # A file:// dataset is a local directory: the local rules for symlinks apply to it too.
        local = isinstance(self.filesystem, filesystem.pyarrow_fs().LocalFileSystem)
        self._local: LocalStore | None = LocalStore(self.root) if local else None

    def __repr__(self) -> str:
        return f"UriStore({self.location!r})"

    def inner(self, rel: str) -> str:
        """The filesystem's own path of ``rel``."""
        return filesystem.dir_prefix(self.root) + rel if rel else self.root

    def check_path(self, rel: str) -> None:
        if self._local is not None and self._local.directory.is_dir():  # a folder not yet made holds no links
            self._local.check_path(rel)
        else:
            check_relative(rel)

    def stray_folders(self, rel: str = "") -> list[tuple[str, str]]:
        if self._local is not None:
            return self._local.stray_folders(rel)
        directory = filesystem.pyarrow_fs().FileType.Directory
        infos = self._infos(rel, True)
        parents = {r.rsplit("/", 1)[0] for r in (self._relative(i.path) for i in infos) if r and "/" in r}
        folders = (self._relative(i.path) for i in infos if i.type == directory)
        return sorted((r, "an empty folder") for r in folders if r and r not in parents)

    def _info(self, rel: str) -> pafs.FileInfo:
        try:
            info: pafs.FileInfo = self.filesystem.get_file_info(self.inner(rel))
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot stat on the filesystem", exc) from exc
        return info

    def stat(self, rel: str) -> FileStat | None:
        info = self._info(rel)
        kind = filesystem.pyarrow_fs().FileType
        if info.type == kind.NotFound:
            return None
        is_file = info.type == kind.File
        return FileStat(int(info.size or 0) if is_file else 0, is_file)

    def open(self, rel: str) -> IO[bytes]:
        try:
            stream: IO[bytes] = self.filesystem.open_input_stream(self.inner(rel), compression=None)
        except FileNotFoundError as exc:
            raise self._missing(rel) from exc
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot open", exc) from exc
        return stream

    def hash(self, rel: str) -> str:
        try:
            with self.filesystem.open_input_stream(self.inner(rel), compression=None) as stream:
                return hash_stream(stream)
        except FileNotFoundError as exc:
            raise self._missing(rel) from exc
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot read to hash", exc) from exc

    def _infos(self, rel: str, recursive: bool) -> list[Any]:
        selector = filesystem.pyarrow_fs().FileSelector(self.inner(rel), recursive=recursive, allow_not_found=True)
        try:
            return list(self.filesystem.get_file_info(selector))
        except NotADirectoryError:
            return []
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot list on the filesystem", exc) from exc

    def _relative(self, inner: str) -> str | None:
        prefix = filesystem.dir_prefix(self.root)
        return inner[len(prefix) :] if inner.startswith(prefix) else None

    def list_dir(self, rel: str = "") -> list[str]:
        found = (self._relative(i.path) for i in self._infos(rel, False))
        return sorted(r.rsplit("/", 1)[-1] for r in found if r)

    def list_files(self, rel: str = "") -> list[str]:
        if self._local is not None:  # the local store's listing: it does not enter symlinked folders
            return self._local.list_files(rel)
        file = filesystem.pyarrow_fs().FileType.File
        found = (self._relative(i.path) for i in self._infos(rel, True) if i.type == file)
        return sorted(r for r in found if r)

    def _make_parent(self, rel: str) -> None:
        parent = str(PurePosixPath(rel).parent)
        folder = self.inner("" if parent == "." else parent)
        if folder in self._made or folder in ("", "/"):
            return
        try:
            self.filesystem.create_dir(folder, recursive=True)
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot create its folder", exc) from exc
        self._made.add(folder)

    def write(self, rel: str, source: IO[bytes]) -> int:
        self._make_parent(rel)
        written = 0
        try:
            with self.filesystem.open_output_stream(self.inner(rel), compression=None) as sink:
                while chunk := source.read(BLOCK):
                    sink.write(chunk)
                    written += len(chunk)
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "upload failed", exc) from exc
        # no rename on an object store: the check that the whole file arrived comes after it
        st = self.stat(rel)
        if st is None or not st.is_file or st.size != written:
            got = "nothing" if st is None else f"{st.size} bytes" if st.is_file else "a folder"
            raise DatasetError(
                f"{self.where(rel)}: wrote {written} bytes, the filesystem reports {got}", path=self.where(rel)
            )
        return written

    def delete(self, rel: str, *, missing_ok: bool = False) -> None:
        try:
            self.filesystem.delete_file(self.inner(rel))
        except FileNotFoundError as exc:
            if not missing_ok:
                raise self._missing(rel) from exc
        except (OSError, pa.ArrowException) as exc:
            raise self._failed(rel, "cannot delete", exc) from exc
