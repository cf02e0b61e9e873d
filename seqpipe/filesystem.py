"""Where source files live: the local disk, or any filesystem ``pyarrow.fs`` reaches by URI.

This module is the one place that knows the difference. A *source path* is a local path
(``Path``, or a ``str`` without a scheme) or a URI: a ``str`` starting with ``scheme://``,
such as ``file:///data/corpus/a.txt`` or ``s3://bucket/corpus/a.jsonl``. Readers, the hash
and the build call the functions here and never open, stat or list a file themselves.

A URI is taken as ``scheme://authority/path``. The filesystem comes from
``pyarrow.fs.FileSystem.from_uri("scheme://authority/")``, made once per process for each
scheme and authority (workers read many parts of many files; they do not reconnect per
call); the path after the authority is used as written (no percent-decoding, no query
string), so it is a glob with the same syntax as a local one (``*``, ``?``, ``[...]``, and
``**`` for any number of directories; hidden names only match a pattern that starts with a
dot) and the URIs a glob yields name files exactly as the filesystem lists them.

Local paths keep the calls seqpipe always made (``os.stat``, ``pa.OSFile``,
``pa.memory_map``), so local builds read and hash exactly as before.
"""

from __future__ import annotations

import fnmatch
import operator
import os
import re
import stat
import threading
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING, Any, Final, TypeAlias

import pyarrow as pa

from seqpipe.errors import RecipeError, SourceError, SourceMissingError

if TYPE_CHECKING:
    import pyarrow.fs as pafs

SourcePath: TypeAlias = "str | Path"
"""A local file (``Path`` or a plain ``str``) or a filesystem URI (a ``str`` with ``scheme://``)."""

_URI: Final = re.compile(r"([A-Za-z][A-Za-z0-9+.\-]*)://([^/]*)(.*)", re.S)
_MAGIC: Final = re.compile(r"[*?\[]")
FILE_GONE: Final = "file not found (it was removed after the glob matched)"  # every reader's message


@dataclass(frozen=True, slots=True)
class Uri:
    """A URI split into its scheme, its authority (host, bucket; may be empty) and its path.

    ``path`` is what follows the authority, without the leading slash.
    """

    scheme: str
    authority: str
    path: str

    @property
    def base(self) -> str:
        """``scheme://authority``: what names one filesystem."""
        return f"{self.scheme}://{self.authority}"

    def child(self, path: str) -> str:
        """The URI of ``path`` (relative to the authority) on the same filesystem."""
        return f"{self.base}/{path}"


@dataclass(frozen=True, slots=True)
class Mount:
    """A filesystem and the path inside it that ``scheme://authority/`` stands for."""

    filesystem: pafs.FileSystem
    root: str

    def inner(self, path: str) -> str:
        """The filesystem's own path for ``path`` (relative to the authority)."""
        return dir_prefix(self.root) + path


def pyarrow_fs() -> Any:
    """``pyarrow.fs``, imported on first use: local builds never need it, and it pulls in TLS
    and the S3 module at every worker's start."""
    import pyarrow.fs

    return pyarrow.fs


_LOCK: Final = threading.Lock()
_MOUNTS: dict[tuple[str, str], Mount] = {}


def is_uri(path: object) -> bool:
    """True for a ``str`` that starts with ``scheme://`` (a ``Path`` is always local)."""
    return isinstance(path, str) and "://" in path and _URI.match(path) is not None


def parse_uri(uri: str) -> Uri:
    """``uri`` split into scheme, authority and path; RecipeError when it is not a URI."""
    match = _URI.fullmatch(uri)
    if match is None:
        raise RecipeError("paths", f"{uri!r} is not a URI (expected scheme://authority/path)")
    scheme, authority, path = match.groups()
    return Uri(scheme, authority, path.lstrip("/"))


def _key(uri: Uri) -> tuple[str, str]:
    return uri.scheme.lower(), uri.authority


def dir_prefix(directory: str) -> str:
    """``directory`` as the prefix of its children's paths ('' stays '', '/' stays '/')."""
    return directory if not directory or directory.endswith("/") else directory + "/"


def root_of(path: str) -> str:
    stripped = path.rstrip("/")
    return stripped if stripped or not path else "/"


def register_filesystem(base: str, filesystem: pafs.FileSystem, root: str = "") -> None:
    """Serve URIs starting with ``base`` (``scheme://authority``) from ``filesystem``, in this process.

    ``root`` is the path inside ``filesystem`` that ``base + "/"`` stands for. This is how a
    test puts an in-memory filesystem behind a made-up scheme; it replaces whatever this
    process had for ``base``. Other processes (spawned workers) do not see it.
    """
    uri = parse_uri(base + "/")
    with _LOCK:
        _MOUNTS[_key(uri)] = Mount(filesystem, root_of(root))


def clear_filesystems() -> None:
    """Forget every filesystem made or registered in this process (the next call reconnects)."""
    with _LOCK:
        _MOUNTS.clear()


def mount(uri: Uri, shown: str) -> Mount:
    """The filesystem for ``uri``'s scheme and authority, made on first use in this process."""
    key = _key(uri)
    with _LOCK:
        found = _MOUNTS.get(key)
        if found is not None:
            return found
        try:
            filesystem, root = pyarrow_fs().FileSystem.from_uri(uri.base + "/")
        except (ValueError, NotImplementedError, pa.ArrowNotImplementedError) as exc:
            # ArrowInvalid (a ValueError): a scheme pyarrow does not know, or a URI it refuses
            raise RecipeError("paths", f"{shown!r}: pyarrow.fs cannot use this URI ({exc})") from exc
        except (OSError, pa.ArrowException) as exc:
            raise SourceError(shown, f"cannot reach the filesystem {uri.base!r}: {exc}") from exc
        found = _MOUNTS[key] = Mount(filesystem, root_of(root))
        return found


def _locate(path: str) -> tuple[pafs.FileSystem, str]:
    """The filesystem holding URI ``path`` and the path inside it."""
    uri = parse_uri(path)
    found = mount(uri, path)
    return found.filesystem, found.inner(uri.path)


# -- globs -------------------------------------------------------------------------------------


def _match_name(pattern: str, name: str) -> bool:
    if name.startswith(".") and not pattern.startswith("."):
        return False
    return fnmatch.fnmatchcase(name, pattern)


def _match(pattern: Sequence[str], names: Sequence[str]) -> bool:
    """True when the names of a relative path match the pattern's segments (``**``: any run)."""
    if not pattern:
        return not names
    head, rest = pattern[0], pattern[1:]
    if head == "**":
        for skip in range(len(names) + 1):
            if skip and names[skip - 1].startswith("."):
                return False
            if _match(rest, names[skip:]):
                return True
        return False
    return bool(names) and _match_name(head, names[0]) and _match(rest, names[1:])


def _info(filesystem: pafs.FileSystem, inner: str | pafs.FileSelector, shown: str) -> Any:
    """``get_file_info`` of a path (one FileInfo) or a selector (a list), errors naming ``shown``."""
    try:
        return filesystem.get_file_info(inner)
    except (OSError, pa.ArrowException) as exc:
        raise SourceError(shown, f"cannot list or stat on the filesystem: {exc}") from exc


def glob_uri(pattern: str) -> list[str]:
    """URIs of the files ``pattern`` matches, sorted by path; SourceMissingError when none does.

    The segments before the first one holding ``*``, ``?`` or ``[`` name a directory that is
    listed once (recursively only when the rest has more than one segment or a ``**``); the
    listed files are matched against the rest of the pattern here.
    """
    uri = parse_uri(pattern)
    found = mount(uri, pattern)
    segments = [s for s in uri.path.split("/") if s]
    fixed = next((i for i, s in enumerate(segments) if _MAGIC.search(s)), len(segments))
    base, rest = segments[:fixed], segments[fixed:]
    if uri.path.endswith("/"):
        hits = []  # a pattern ending in a slash names directories, never a file
    elif not rest:
        info = _info(found.filesystem, found.inner("/".join(base)), pattern)
        hits = [uri.child("/".join(base))] if base and info.type == pyarrow_fs().FileType.File else []
    else:
        directory = found.inner("/".join(base))
        deep = len(rest) > 1 or "**" in rest
        selector = pyarrow_fs().FileSelector(directory, recursive=deep, allow_not_found=True)
        infos = _info(found.filesystem, selector, pattern)
        prefix = dir_prefix(directory)
        hits = []
        for info in infos:
            if info.type != pyarrow_fs().FileType.File or not info.path.startswith(prefix):
                continue
            names = info.path[len(prefix) :].split("/")
            if _match(rest, names):
                hits.append(uri.child("/".join([*base, *names])))
    if not hits:
        raise SourceMissingError(pattern, f"glob {pattern!r} matched no file")
    return sorted(set(hits))  # one scheme and authority: the order of the paths


# -- opening and stat --------------------------------------------------------------------------


def open_input_file(path: SourcePath, *, memory_map: bool = False) -> pa.NativeFile:
    """``path`` opened for random access (seek, read_at); locally memory-mapped if asked.

    Errors are pyarrow's (``FileNotFoundError``, ``OSError``): callers name the file in theirs.
    """
    if is_uri(path):
        filesystem, inner = _locate(str(path))
        return filesystem.open_input_file(inner)
    if memory_map:
        return pa.memory_map(str(path))
    return pa.OSFile(str(path), "rb")


def open_input_stream(path: SourcePath, codec: str | None) -> pa.NativeFile:
    """``path`` opened for reading from the start, decompressed with pyarrow codec ``codec``.

    ``codec=None`` reads the bytes as they are (a URI is then opened for random access, so
    the caller may seek). Errors are pyarrow's, as for :func:`open_input_file`.
    """
    if codec is None:
        return open_input_file(path)
    if is_uri(path):
        filesystem, inner = _locate(str(path))
        # an explicit codec: the default ("detect") would guess one from the name
        return filesystem.open_input_stream(inner, compression=codec)
    return pa.input_stream(str(path), compression=codec)


def open_raw_stream(path: SourcePath) -> pa.NativeFile:
    """``path`` opened for one sequential read of its bytes as stored (never decompressed)."""
    if is_uri(path):
        filesystem, inner = _locate(str(path))
        return filesystem.open_input_stream(inner, compression=None)
    return pa.OSFile(str(path), "rb")


def _file_info(path: str) -> pafs.FileInfo:
    filesystem, inner = _locate(path)
    info: pafs.FileInfo = _info(filesystem, inner, path)
    if info.type == pyarrow_fs().FileType.NotFound:
        raise SourceMissingError(path, FILE_GONE)
    if info.type != pyarrow_fs().FileType.File:
        raise SourceError(path, f"not a file ({info.type.name.lower()})")
    return info


def _stat(path: SourcePath) -> os.stat_result:
    try:
        return os.stat(path)
    except FileNotFoundError as exc:
        raise SourceMissingError(str(path), FILE_GONE) from exc
    except OSError as exc:
        raise SourceError(str(path), f"cannot read the file: {exc.strerror or exc}") from exc


def file_size(path: SourcePath) -> int:
    """Size of ``path`` in bytes; SourceMissingError when it is gone, SourceError when unreadable."""
    if is_uri(path):
        size = _file_info(str(path)).size
        if size is None:
            raise SourceError(str(path), "the filesystem does not report the file's size")
        return int(size)
    return _stat(path).st_size


def change_stamp(path: SourcePath) -> list[int] | None:
    """What must stay equal for a stored hash of ``path`` to be reused (None: never reuse).

    Local files: size, mtime in nanoseconds and inode. URIs: size and mtime in nanoseconds;
    None when the filesystem reports no mtime, so the file is hashed again on every build.
    """
    if is_uri(path):
        info = _file_info(str(path))
        if info.size is None or info.mtime_ns is None:
            return None
        return [int(info.size), int(info.mtime_ns)]
    st = _stat(path)
    return [st.st_size, st.st_mtime_ns, st.st_ino]


def identity(path: SourcePath) -> str | Path:
    """What two names of the same file share: the resolved local path, or the URI itself."""
    return str(path) if is_uri(path) else Path(path).resolve()


def suffix(path: SourcePath) -> str:
    """The file name's last suffix (``".gz"``), from the URI's path for a URI."""
    if is_uri(path):
        return PurePosixPath(parse_uri(str(path)).path).suffix
    return Path(path).suffix


# -- local globs -------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class LocalMatches:
    """What a local glob matched: regular files, and the matches that are not one.

    ``files`` are relative POSIX paths of regular files (symlinks to one included), in walk
    order. ``skipped`` pairs a relative path with what it is instead: ``"fifo"``, ``"socket"``,
    ``"character device"``, ``"block device"``, ``"directory"``, ``"dangling symlink"``, or
    ``"symlink loop"`` (a directory symlink that leads back to a directory being walked).
    """

    files: tuple[str, ...]
    skipped: tuple[tuple[str, str], ...]
    # per file when asked for (glob_local's ``stamped``): its change_stamp from the walk's own
    # lstat of a plain file, None for a symlink (or a file gone meanwhile): ask again
    stamps: tuple[list[int] | None, ...] = ()


def _kind_of(mode: int) -> str:
    kinds = (
        (stat.S_ISFIFO, "fifo"),
        (stat.S_ISSOCK, "socket"),
        (stat.S_ISCHR, "character device"),
        (stat.S_ISBLK, "block device"),
        (stat.S_ISDIR, "directory"),
    )
    return next((name for test, name in kinds if test(mode)), "special file")


def _target_stat(path: str) -> os.stat_result | None:
    """``os.stat`` following symlinks; None for a dangling symlink or a symlink loop."""
    try:
        return os.stat(path)
    except OSError:
        return None


def _advance(rest: Sequence[str], states: frozenset[int], name: str) -> frozenset[int]:
    """The pattern positions reachable from ``states`` after one more path name (``_match`` as
    a set of positions: a ``**`` consumes any name not hidden, or nothing)."""
    out: set[int] = set()
    for i in states:
        if i == len(rest):
            continue
        head = rest[i]
        if head == "**":
            if not name.startswith("."):
                out.add(i)
        elif _match_name(head, name):
            out.add(i + 1)
    return _closure(rest, out)


def _closure(rest: Sequence[str], states: Iterable[int]) -> frozenset[int]:
    """``states`` with every position a run of ``**`` segments may skip to."""
    out = set(states)
    todo = list(out)
    while todo:
        i = todo.pop()
        if i < len(rest) and rest[i] == "**" and i + 1 not in out:
            out.add(i + 1)
            todo.append(i + 1)
    return frozenset(out)


_Entries: TypeAlias = "list[os.DirEntry[str]]"


def _last_name_matcher(rest: Sequence[str], states: frozenset[int]) -> Callable[[_Entries], _Entries]:
    """The entries whose names, appended to a path that reached ``states``, complete the match
    (what ``len(rest) in _advance(rest, states, name)`` says, with the patterns compiled once),
    in their order; a directory's files are picked by one call, not one call per name."""
    end = len(rest)
    # a trailing ``**`` the path reached takes any name not hidden
    any_shown = end in states and rest[-1] == "**"
    heads = sorted({rest[i] for i in states if i < end and rest[i] != "**" and all(r == "**" for r in rest[i + 1 :])})
    # one expression for the heads a shown name may match, one for those a hidden name may
    shown = _any_of(heads)
    hidden = _any_of([h for h in heads if h.startswith(".")])

    def pick(entries: _Entries) -> _Entries:
        if any_shown:
            return [e for e in entries if not e.name.startswith(".") or hidden(e.name) is not None]
        return [e for e in entries if (hidden if e.name.startswith(".") else shown)(e.name) is not None]

    return pick


def _any_of(patterns: Sequence[str]) -> Callable[[str], re.Match[str] | None]:
    """The ``match`` of one expression that matches a name any of the shell ``patterns`` matches."""
    if not patterns:
        return lambda name: None
    return re.compile("|".join(f"(?:{fnmatch.translate(p)})" for p in patterns)).match


class _LocalWalk:
    """One walk of a directory tree for the segments of a glob after its fixed prefix.

    Each real directory (device and inode) is entered at most once, so a symlink that points
    back to a directory on the current walk, or a branching loop of them, costs one visit
    instead of growing until the path length limit (which ``glob.glob`` does). An entry's type
    comes from the directory listing: only symlinks, directories and special files are stat'ed,
    so a tree of many files costs one listing per directory, and each directory carries the
    pattern positions its path reached, so a file's name is matched once, not its whole path.
    """

    __slots__ = ("base", "deep", "files", "hidden", "pickers", "rest", "seen", "skipped", "stamps")

    def __init__(self, base: str, rest: list[str], stamped: bool = False) -> None:
        self.base = base
        self.rest = rest
        self.deep = "**" in rest
        self.hidden = any(s.startswith(".") for s in rest)
        self.files: list[str] = []
        self.stamps: list[list[int] | None] | None = [] if stamped else None
        self.skipped: list[tuple[str, str]] = []
        self.seen: set[tuple[int, int]] = set()
        self.pickers: dict[frozenset[int], Callable[[_Entries], _Entries]] = {}

    def _may_descend(self, names: list[str]) -> bool:
        if not self.hidden and names[-1].startswith("."):
            return False
        if self.deep:
            return True
        return len(names) < len(self.rest) and all(_match_name(p, n) for p, n in zip(self.rest, names, strict=False))

    def walk(
        self, directory: str, names: list[str], ancestors: frozenset[tuple[int, int]], states: frozenset[int]
    ) -> None:
        # listed through a descriptor where the system allows: each file's lstat is then an
        # fstatat of its bare name in the open directory, not a lookup of its whole path
        try:
            fd = os.open(directory, _DIR_FLAGS) if _LIST_BY_FD else None
        except OSError:
            return  # unreadable or vanished directory: glob.glob skips it too
        try:
            self._walk_listed(directory, fd, names, ancestors, states)
        finally:
            if fd is not None:
                os.close(fd)

    def _walk_listed(
        self,
        directory: str,
        fd: int | None,
        names: list[str],
        ancestors: frozenset[tuple[int, int]],
        states: frozenset[int],
    ) -> None:
        try:
            with os.scandir(directory if fd is None else fd) as it:
                entries = sorted(it, key=_ENTRY_NAME)
        except OSError:
            return  # unreadable or vanished directory: glob.glob skips it too
        end = len(self.rest)
        lead = os.path.join(directory, "")
        prefix = "/".join(names) + "/" if names else ""
        pick = self.pickers.get(states)
        if pick is None:  # the directories of a tree reach few distinct states: compiled once each
            pick = self.pickers[states] = _last_name_matcher(self.rest, states)
        run: list[os.DirEntry[str]] = []  # consecutive plain files, taken together (in order)
        for entry in entries:
            try:  # a symlink is not a file here (the listing's type, no stat)
                plain_file = entry.is_file(follow_symlinks=False)
            except OSError:
                plain_file = False
            if plain_file:  # the common case: matched by name, a stat only when stamped
                run.append(entry)
                continue
            if run:
                self._take(pick(run), prefix)
                run = []
            reached = _advance(self.rest, states, entry.name)
            matched = end in reached
            path = lead + entry.name  # entry.path is the bare name when listed through a descriptor
            st = _target_stat(path)
            rel = prefix + entry.name
            if st is None:
                if matched:
                    self.skipped.append((rel, "dangling symlink" if entry.is_symlink() else "unreadable"))
                continue
            if stat.S_ISDIR(st.st_mode):
                if matched and self.rest[-1] != "**":
                    self.skipped.append((rel, "directory"))
                here = [*names, entry.name]
                if not self._may_descend(here):
                    continue
                ident = (st.st_dev, st.st_ino)
                if ident in ancestors:
                    self.skipped.append((rel, "symlink loop"))
                elif ident not in self.seen:
                    self.seen.add(ident)
                    self.walk(path, here, ancestors | {ident}, reached)
            elif matched:
                if stat.S_ISREG(st.st_mode):
                    self.files.append(rel)
                    if self.stamps is not None:
                        self.stamps.append(None)  # a symlink: its identity and stamp are asked again
                else:
                    self.skipped.append((rel, _kind_of(st.st_mode)))
        if run:
            self._take(pick(run), prefix)

    def _take(self, picked: list[os.DirEntry[str]], prefix: str) -> None:
        """Add plain files that match (their directory's ``prefix`` joined), with their stamps."""
        self.files.extend([prefix + e.name for e in picked])
        stamps = self.stamps
        if stamps is None:
            return
        for e in picked:  # the file's own lstat: its change_stamp
            try:
                own = e.stat(follow_symlinks=False)
            except OSError:
                stamps.append(None)  # gone meanwhile: asked again, which reports it
            else:
                stamps.append([own.st_size, own.st_mtime_ns, own.st_ino])


_LIST_BY_FD: Final = os.scandir in os.supports_fd
_DIR_FLAGS: Final = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_CLOEXEC", 0)


_ENTRY_NAME: Final = operator.attrgetter("name")  # a DirEntry's sort key, without a Python call


def glob_local(root: Path, pattern: str, *, stamped: bool = False) -> LocalMatches:
    """What ``pattern`` (relative to ``root``, or absolute) matches on the local disk.

    The same syntax as :func:`glob_uri` (and ``glob.glob(recursive=True)``): ``*``, ``?``,
    ``[...]``, ``**`` for any number of directories, hidden names only for patterns that start
    with a dot. Paths in the result are relative to ``root`` as written (``..`` kept).
    ``stamped``: with each file's change stamp where the walk's lstat of it gives one (a plain
    file; see ``LocalMatches.stamps``), so a build lists and stamps its inputs in one pass.
    """
    if pattern.endswith("/"):
        return LocalMatches((), ())  # a pattern ending in a slash names directories, never a file
    segments = [s for s in pattern.split("/") if s and s != "."]
    fixed = next((i for i, s in enumerate(segments) if _MAGIC.search(s)), len(segments))
    base, rest = segments[:fixed], segments[fixed:]
    prefix = "/" if pattern.startswith("/") else ""
    base_rel = prefix + "/".join(base)
    if not rest:
        full = os.path.join(root, base_rel) if base_rel else str(root)
        st = _target_stat(full)
        if st is None:
            dangling = os.path.islink(full)
            return LocalMatches((), ((base_rel, "dangling symlink"),) if dangling else ())
        if not os.path.isfile(full):
            return LocalMatches((), ((base_rel, _kind_of(st.st_mode)),))
        return LocalMatches((base_rel,), (), (None,) if stamped else ())
    start = os.path.join(root, base_rel) if base_rel else str(root)
    walk = _LocalWalk(start, rest, stamped)
    st = _target_stat(start)
    if st is None or not os.path.isdir(start):
        return LocalMatches((), ())
    walk.seen.add((st.st_dev, st.st_ino))
    walk.walk(start, [], frozenset({(st.st_dev, st.st_ino)}), _closure(rest, (0,)))
    lead = base_rel.rstrip("/") + "/" if base_rel else ""
    stamps = tuple(walk.stamps) if walk.stamps is not None else ()
    files = tuple([lead + f for f in walk.files]) if lead else tuple(walk.files)
    return LocalMatches(files, tuple((lead + p, w) for p, w in walk.skipped), stamps)
