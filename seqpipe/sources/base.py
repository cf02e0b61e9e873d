"""The interface every source kind implements, and the document rules they share.

A source is one ``[[sources]]`` entry of a recipe. Reading it takes three calls,
so that a build can spread the work over processes without reading a file twice:

1. ``resolve(root)`` -> the files its globs match, in a fixed order;
2. ``plan(path, target_bytes)`` -> :class:`Part` s of one file, each about
   ``target_bytes`` long and cut on document boundaries;
3. ``read(path, part, stats)`` -> ``pa.large_string()`` arrays of documents.

The documents a file yields never depend on how it was planned or on
``batch_bytes``: the contract tests check this for every kind.

Rules every kind follows (see :class:`DocumentFinisher`): a document larger than
``max_document_bytes`` is refused, skipped or truncated (``on_oversize``) *before*
its bytes are decoded; bytes that are not UTF-8 are refused, replaced with
U+FFFD or make the document skipped (``on_invalid_utf8``); CRLF and CR-only line
ends become ``"\\n"`` (unless ``line_ends = "keep"``); a document with nothing but
ASCII blanks (space, tab, vertical tab, form feed, line ends) is not emitted and is
counted in ``ReadStats.blank_skipped``.
"""

from __future__ import annotations

import dataclasses
import os
import re
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path, PurePath
from typing import Any, ClassVar, Final

import pyarrow as pa

from seqpipe._parse import parse_int, parse_str, parse_str_tuple, to_plain
from seqpipe.errors import InvalidUtf8Error, RecipeError, SourceError, SourceMissingError
from seqpipe.filesystem import LocalMatches, SourcePath, glob_local, glob_uri, is_uri

DEFAULT_MAX_DOCUMENT_BYTES: Final = 64 << 20
DEFAULT_BATCH_BYTES: Final = 1 << 20
INVALID_UTF8_POLICIES: Final = ("error", "replace", "skip")
OVERSIZE_POLICIES: Final = ("error", "skip", "truncate")
BAD_RECORD_POLICIES: Final = ("error", "skip")
SPLIT_NAMES: Final = ("train", "validation", "test")  # as seqpipe.recipe.SPLIT_NAMES (which imports this module)
SPECIAL_FILE_POLICIES: Final = ("skip", "error")
LINE_END_MODES: Final = ("normalize", "keep")

# A document made only of these (after line-end handling) is empty for our purposes.
_BLANK_TEXT: Final = re.compile(r"[ \t\x0b\x0c\r\n]*")


def glob_base(pattern: str) -> str:
    """The fixed directory part of a glob: its leading components without a wildcard, the last
    component (the file part) never included ("logs/2026/*.txt" -> "logs/2026", "*.txt" -> ".")."""
    parts = re.split(r"[/\\]", pattern) if os.sep == "\\" else pattern.split("/")
    fixed: list[str] = []
    for part in parts[:-1]:
        if re.search(r"[*?\[]", part):
            break
        fixed.append(part)
    if not fixed:
        return "."
    return "/".join(fixed) or "/"  # an absolute glob's first component is empty


@dataclass(frozen=True, slots=True)
class Part:
    """A piece of one file that one ``read`` call handles.

    ``[start, stop)`` are byte offsets for text and JSON Lines files (``stop=None``:
    to the end of the stream, used for compressed files), row-group indices for
    Parquet and record-batch indices for Arrow IPC files.
    """

    start: int = 0
    stop: int | None = None


@dataclass(slots=True)
class ReadStats:
    """Counters a reader fills while it reads; ``add`` merges the counts of parallel reads.

    ``documents`` counts emitted documents; ``bytes_read`` counts input bytes consumed
    (after decompression; for columnar files, the bytes of the text values). The other
    counters count documents (records) affected by each policy.
    """

    documents: int = 0
    bytes_read: int = 0
    invalid_utf8_replaced: int = 0
    invalid_utf8_skipped: int = 0
    bad_records_skipped: int = 0
    oversize_skipped: int = 0
    oversize_truncated: int = 0
    blank_skipped: int = 0

    def add(self, other: ReadStats) -> None:
        """Add ``other``'s counts to these."""
        for f in dataclasses.fields(self):
            setattr(self, f.name, getattr(self, f.name) + getattr(other, f.name))

    def as_dict(self) -> dict[str, int]:
        """The counters as a plain dict (for manifests and reports)."""
        return {f.name: int(getattr(self, f.name)) for f in dataclasses.fields(self)}


@dataclass(frozen=True, slots=True)
class Resolved:
    """What a source's globs matched: the files to read, and ``(path, what)`` of each other match
    (paths relative to the glob base, as inputs are named; see :meth:`Source.resolve_all`)."""

    files: list[SourcePath]
    skipped: tuple[tuple[str, str], ...]
    names: tuple[str, ...] = ()  # per file, the name a manifest records (Source.resolve_named)
    # per file when asked for (``stamped``): its change stamp from the glob's walk, or None
    stamps: tuple[list[int] | None, ...] = ()


def _recorded_name(path: str, base: str) -> str:
    """``path`` (relative to the recipe's directory) as a manifest records it: relative to the
    fixed directory part of the glob that matched it, with '/' separators."""
    path = os.path.normpath(path)
    if os.sep == "/":  # the common case without relpath's two abspath calls (a corpus of many files)
        base = os.path.normpath(base)
        if base == "." and not os.path.isabs(path):
            return path
        if path.startswith(base.rstrip("/") + "/"):
            return path[len(base.rstrip("/")) + 1 :]
    return PurePath(os.path.relpath(path, base)).as_posix()


def _prefix(base: str) -> str:
    """What ``_recorded_name`` strips from a normalized path under ``base`` ("" when it does
    more: a base of ".", or separators other than "/")."""
    base = os.path.normpath(base)
    if os.sep != "/" or base == ".":
        return ""
    return base.rstrip("/") + "/"


def _joined(top: str, key: str) -> str:
    """``os.path.join(top, key)`` for a non-empty ``top``, without its calls on "/" systems."""
    if os.sep != "/" or key.startswith("/"):
        return os.path.join(top, key)
    return top + key if top.endswith("/") else top + "/" + key


def _one_walk(
    matches: LocalMatches, top: str, base: str, skipped: tuple[tuple[str, str], ...], stamped: bool
) -> Resolved:
    """``Source.resolve_all`` of one local glob (its files ``str``, its matches normalized, its
    fixed part ``base``): one walk names no file twice, so no key is looked up, and each list
    is one pass (a corpus of many files)."""
    keys = matches.files
    order = sorted(range(len(keys)), key=keys.__getitem__)  # the walk's order is nearly sorted
    walked = order == list(range(len(keys)))  # often sorted already: no reordering then
    ordered = keys if walked else [keys[i] for i in order]
    lead = top if top.endswith("/") else top + "/"
    files: list[SourcePath] = [key if key.startswith("/") else lead + key for key in ordered]
    under = _prefix(base)
    cut = len(under)
    names = tuple([key[cut:] if under and key.startswith(under) else _recorded_name(key, base) for key in ordered])
    stamps = (matches.stamps if walked else tuple([matches.stamps[i] for i in order])) if stamped else ()
    return Resolved(files, skipped, names, stamps)


def _posix_key(path: str) -> str:
    """A glob match's normalized POSIX path (its sort key)."""
    path = os.path.normpath(path)
    return path if os.sep == "/" else PurePath(path).as_posix()


def _parse_paths(value: Any) -> tuple[str, ...]:
    if isinstance(value, str):
        value = (value,)
    globs = parse_str_tuple("paths", value)
    if not globs:
        raise RecipeError("paths", "missing: expected a glob or a non-empty list of globs")
    return globs


@dataclass(frozen=True, slots=True)
class Source(ABC):
    """Fields every source kind has; see the module docstring for the reading protocol.

    ``paths`` (required) is one glob or a list of globs relative to the recipe's
    directory (``**`` matches any number of directories), or filesystem URIs that
    ``pyarrow.fs`` understands (``s3://bucket/corpus/**/*.jsonl``, ``file:///data/*.txt``;
    see :mod:`seqpipe.filesystem`); it is stored as a tuple.
    """

    kind: ClassVar[str]

    paths: tuple[str, ...] = ()
    on_invalid_utf8: str = "error"
    max_document_bytes: int = DEFAULT_MAX_DOCUMENT_BYTES
    on_oversize: str = "error"
    # a split every document of this source goes to ("": the hash-based assignment), e.g. a
    # held-out logbook that must stay in validation whatever its content hashes to
    fixed_split: str = ""
    on_special_file: str = "skip"
    line_ends: str = "normalize"

    def __post_init__(self) -> None:
        object.__setattr__(self, "paths", _parse_paths(self.paths))
        parse_str("fixed_split", self.fixed_split, choices=("", *SPLIT_NAMES), allow_empty=True)
        parse_str("on_invalid_utf8", self.on_invalid_utf8, choices=INVALID_UTF8_POLICIES)
        parse_int("max_document_bytes", self.max_document_bytes, minimum=1)
        parse_str("on_oversize", self.on_oversize, choices=OVERSIZE_POLICIES)
        parse_str("on_special_file", self.on_special_file, choices=SPECIAL_FILE_POLICIES)
        parse_str("line_ends", self.line_ends, choices=LINE_END_MODES)

    def to_dict(self) -> dict[str, Any]:
        """The source as a plain table (with its ``kind``), for canonical recipes."""
        plain: dict[str, Any] = to_plain(self)
        return plain

    def resolve(self, root: Path) -> list[SourcePath]:
        """Files the globs match under ``root``: sorted by relative POSIX path, each once.

        A local file is a ``Path`` under ``root``; a URI glob yields URIs (``str``), sorted
        among the local keys by the URI itself. Raises :class:`SourceMissingError` for a
        glob that matches no file. What else a local glob matches is in :meth:`resolve_all`.
        """
        return self.resolve_all(root).files

    def resolve_named(self, root: Path) -> list[tuple[SourcePath, str]]:
        """:meth:`resolve`'s files, each with the name a manifest records for it: its POSIX path
        relative to the glob base (the fixed directory part) of the first glob that matched it,
        so neither where the recipe sits nor an absolute glob's directory enters a fingerprint;
        a URI is its own name."""
        resolved = self.resolve_all(root)
        return list(zip(resolved.files, resolved.names, strict=True))

    def resolve_all(self, root: Path, *, as_str: bool = False, stamped: bool = False) -> Resolved:
        """:meth:`resolve`'s files (with their recorded names, see :meth:`resolve_named`), and
        the local matches that are not regular files.

        A FIFO, socket, device, directory, dangling symlink or symlink loop that a glob
        matches is skipped and listed (``on_special_file = "skip"``, the default) or refused
        with a :class:`SourceError` naming it (``"error"``). Each real directory is walked
        once, so a symlink loop cannot make the glob run forever. ``as_str``: local files as
        the ``str`` of the ``Path`` they would be (a build of many files makes no ``Path``).
        ``stamped``: with each file's change stamp where listing it gave one (``Resolved.stamps``).
        """
        top = str(root)
        found: dict[str, tuple[SourcePath, str, list[int] | None]] = {}
        skipped: dict[str, str] = {}
        for pattern in self.paths:
            if is_uri(pattern):
                for uri in glob_uri(pattern):
                    found.setdefault(uri, (uri, uri, None))
                continue
            matches = glob_local(root, pattern, stamped=stamped)
            base = glob_base(pattern)
            for rel, what in matches.skipped:
                if self.on_special_file == "error":
                    raise SourceError(
                        str(root / rel),
                        f"glob {pattern!r} matches a {what}, not a regular file; remove it, narrow the "
                        'glob, or set on_special_file = "skip" to skip and list it',
                    )
                # named like the inputs (relative to the glob base), so the manifest does not
                # depend on where the recipe sits
                skipped.setdefault(_recorded_name(rel, base), what)
            if not matches.files:
                raise SourceMissingError(str(root), f"glob {pattern!r} matched no file under {root}")
            under = _prefix(base)
            # a walk's matches are normalized already unless the fixed part climbs ("..")
            normal = os.sep == "/" and ".." not in pattern.split("/")
            if len(self.paths) == 1 and normal and as_str and under and top != ".":
                return _one_walk(matches, top, base, tuple(sorted(skipped.items())), stamped)
            stamps = matches.stamps or (None,) * len(matches.files)
            for hit, stamp in zip(matches.files, stamps, strict=True):
                key = hit if normal else _posix_key(hit)
                if key not in found:
                    local = (key if top == "." else _joined(top, key)) if as_str else root / key
                    # the common case of _recorded_name without its calls (a corpus of many files)
                    name = key[len(under) :] if under and key.startswith(under) else _recorded_name(hit, base)
                    found[key] = (local, name, stamp)
        ordered = [found[key] for key in sorted(found)]
        return Resolved(
            [p for p, _, _ in ordered],
            tuple(sorted(skipped.items())),
            tuple(n for _, n, _ in ordered),
            tuple(st for _, _, st in ordered) if stamped else (),
        )

    @abstractmethod
    def plan(self, path: SourcePath, target_bytes: int) -> list[Part]:
        """Cut ``path`` into parts of about ``target_bytes`` on document boundaries."""

    def plan_sized(self, path: SourcePath, size: int, target_bytes: int) -> list[Part] | None:
        """What :meth:`plan` gives for ``path`` of ``size`` bytes when that follows from the
        size and the name alone (no read, no stat: planning many small files costs nothing per
        file); None when only :meth:`plan` can tell."""
        return None

    @abstractmethod
    def read(
        self, path: SourcePath, part: Part, stats: ReadStats, *, batch_bytes: int = DEFAULT_BATCH_BYTES
    ) -> Iterator[pa.Array]:
        """Yield the documents of ``part`` as ``large_string`` arrays of about ``batch_bytes``."""

    def read_many(
        self,
        parts: Sequence[tuple[SourcePath, Part]],
        stats: ReadStats,
        counts: list[int],
        *,
        batch_bytes: int = DEFAULT_BATCH_BYTES,
    ) -> Iterator[pa.Array]:
        """The documents of several ``(path, part)`` in turn (a run of small files sharing a
        build part); appends to ``counts`` how many documents each gave, once it is read."""
        for path, part in parts:
            documents = 0
            for batch in self.read(path, part, stats, batch_bytes=batch_bytes):
                documents += len(batch)
                yield batch
            counts.append(documents)

    def documents(
        self, root: Path, stats: ReadStats, *, target_bytes: int = 64 << 20, batch_bytes: int = DEFAULT_BATCH_BYTES
    ) -> Iterator[pa.Array]:
        """Every document of every matched file, in order, in one process."""
        for path in self.resolve(root):
            for part in self.plan(path, target_bytes):
                yield from self.read(path, part, stats, batch_bytes=batch_bytes)


@dataclass(frozen=True, slots=True)
class RecordSource(Source):
    """Fields of the kinds that hold records (JSON Lines, Parquet, Arrow IPC).

    ``field`` names the text field (column). ``on_bad_record``: what to do with a
    record whose text is missing, null or not a string (JSON Lines also: a line
    that is not JSON) -- ``"error"`` or ``"skip"`` (counted).
    """

    field: str = "text"
    on_bad_record: str = "error"

    def __post_init__(self) -> None:
        Source.__post_init__(self)
        parse_str("field", self.field)
        parse_str("on_bad_record", self.on_bad_record, choices=BAD_RECORD_POLICIES)


Data = bytes | bytearray | memoryview


def truncate_utf8(data: Data, limit: int) -> Data:
    """The first ``limit`` bytes of ``data``, moved back so no UTF-8 character is cut."""
    if len(data) <= limit:
        return data
    cut = limit
    # Step back over at most three continuation bytes (10xxxxxx): the cut then sits
    # before the lead byte of the character that straddled the limit.
    while cut > 0 and limit - cut < 3 and (data[cut] & 0xC0) == 0x80:
        cut -= 1
    return data[:cut]


def normalize_line_ends(text: str) -> str:
    """CRLF and CR-only line ends as ``"\\n"``."""
    if "\r" not in text:
        return text
    return text.replace("\r\n", "\n").replace("\r", "\n")


def is_blank(text: str) -> bool:
    """True when ``text`` holds nothing but ASCII blanks and line ends."""
    return _BLANK_TEXT.fullmatch(text) is not None


class DocumentFinisher:
    """Applies the size, UTF-8, line-end and blank rules to one document, counting in ``stats``.

    Errors name the file and where the document is: an absolute byte offset (in the
    decompressed stream for compressed files), a line number, or a row index.
    ``line_of`` maps the line numbers callers pass to the ones errors show; it is
    only called when an error is raised (JSON Lines parts count lines lazily).
    """

    __slots__ = ("_compressed", "_invalid", "_keep_cr", "_limit", "_line_of", "_oversize", "path", "stats")

    def __init__(
        self,
        source: Source,
        path: SourcePath,
        stats: ReadStats,
        *,
        compressed: bool = False,
        line_of: Callable[[int], int] | None = None,
    ) -> None:
        self.path = str(path)
        self.stats = stats
        self._limit = source.max_document_bytes
        self._oversize = source.on_oversize
        self._invalid = source.on_invalid_utf8
        self._keep_cr = source.line_ends == "keep"
        self._compressed = compressed
        self._line_of = line_of

    def error(
        self,
        cls: type[SourceError],
        message: str,
        *,
        offset: int | None = None,
        line: int | None = None,
        row: int | None = None,
    ) -> SourceError:
        """An error of class ``cls`` naming this file and the place given."""
        if row is not None:
            message = f"row {row}: {message}"
        if self._compressed and offset is not None:
            message += " (the byte offset counts the decompressed stream)"
        if line is not None and self._line_of is not None:
            line = self._line_of(line)
        return cls(self.path, message, offset=offset, line=line)

    def oversize_error(
        self, size: int | None, *, offset: int | None = None, line: int | None = None, row: int | None = None
    ) -> SourceError:
        """The error for a document over ``max_document_bytes`` (size None: not known yet)."""
        what = "a document" if size is None else f"a document of {size} bytes"
        message = (
            f"{what} is larger than max_document_bytes = {self._limit}; raise the limit "
            'or set on_oversize = "skip" or "truncate"'
        )
        return self.error(SourceError, message, offset=offset, line=line, row=row)

    def check_size(
        self, size: int, *, offset: int | None = None, line: int | None = None, row: int | None = None
    ) -> bool:
        """False when a document of ``size`` bytes is dropped; True to keep (truncated if over)."""
        if size <= self._limit:
            return True
        if self._oversize == "error":
            raise self.oversize_error(size, offset=offset, line=line, row=row)
        if self._oversize == "skip":
            self.stats.oversize_skipped += 1
            return False
        self.stats.oversize_truncated += 1
        return True

    def decode(
        self,
        data: bytes | bytearray | memoryview,
        *,
        offset: int | None = None,
        line: int | None = None,
        row: int | None = None,
    ) -> str | None:
        """``data`` as text under the ``on_invalid_utf8`` policy (None: the document is skipped)."""
        try:
            return str(data, "utf-8")
        except UnicodeDecodeError as exc:
            if self._invalid == "error":
                at = None if offset is None else offset + exc.start
                where = "" if row is None else f"at byte {exc.start} of the value "
                hint = 'set on_invalid_utf8 = "replace" or "skip" to read past it'
                message = f"invalid UTF-8 {where}({exc.reason}); {hint}"
                raise self.error(InvalidUtf8Error, message, offset=at, line=line, row=row) from None
        if self._invalid == "skip":
            self.stats.invalid_utf8_skipped += 1
            return None
        self.stats.invalid_utf8_replaced += 1
        return str(data, "utf-8", "replace")

    def finish(
        self,
        data: bytes | bytearray | memoryview,
        *,
        offset: int | None = None,
        line: int | None = None,
        row: int | None = None,
    ) -> str | None:
        """The document held in ``data``, or None when a policy drops it (the drop is counted)."""
        if not self.check_size(len(data), offset=offset, line=line, row=row):
            return None
        text = self.decode(truncate_utf8(data, self._limit), offset=offset, line=line, row=row)
        if text is None:
            return None
        return self._unless_blank(text)

    def _unless_blank(self, text: str) -> str | None:
        """``text`` with its line ends as ``line_ends`` says, or None (counted) when it is blank."""
        if not self._keep_cr:
            text = normalize_line_ends(text)
        if is_blank(text):
            self.stats.blank_skipped += 1
            return None
        return text

    def finish_text(
        self, text: str, encoded_size: int, *, line: int | None = None, row: int | None = None
    ) -> str | None:
        """Like :meth:`finish` for text already decoded (a JSON string value)."""
        if not self.check_size(encoded_size, line=line, row=row):
            return None
        if encoded_size > self._limit:
            text = str(truncate_utf8(text.encode("utf-8"), self._limit), "utf-8")
        return self._unless_blank(text)


def to_array(docs: list[str], stats: ReadStats) -> pa.Array:
    """Documents as a ``large_string`` array, counted in ``stats``."""
    stats.documents += len(docs)
    return pa.array(docs, type=pa.large_string())
