"""Source readers: the shared contract every kind passes, then each kind's own rules.

Outside references used here: Python's UTF-8 codec (``bytes.decode``, whose error
offsets and U+FFFD substitution follow the Unicode Standard, ch. 3 "U+FFFD
Substitution of Maximal Subparts"), the stdlib ``gzip``/``bz2``/``json``
writers, and pyarrow's Parquet / Arrow IPC writers.
"""

from __future__ import annotations

import bz2
import gzip
import importlib.util
import itertools
import json
import tempfile
import tracemalloc
from pathlib import Path
from typing import Any, ClassVar

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqpipe.errors import InvalidUtf8Error, RecipeError, RecordError, SourceError, SourceMissingError
from seqpipe.sources import (
    SOURCE_KINDS,
    ArrowSource,
    JsonlSource,
    ParquetSource,
    ReadStats,
    Source,
    TextSource,
    parse_source,
)

ROOT = Path(__file__).resolve().parent.parent
HOSTILE = ROOT / "fixtures" / "hostile"
BLANKS = " \t\x0b\x0c\n"


def read_all(
    source: Source,
    root: Path,
    *,
    target_bytes: int = 1 << 30,
    batch_bytes: int = 1 << 20,
    stats: ReadStats | None = None,
) -> list[str]:
    stats = ReadStats() if stats is None else stats
    out: list[str] = []
    for array in source.documents(root, stats, target_bytes=target_bytes, batch_bytes=batch_bytes):
        assert array.type == pa.large_string()
        out.extend(array.to_pylist())
    return out


def _not_blank(text: str) -> bool:
    return text.strip(BLANKS) != ""


_chars = st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\ufeff")
_line = st.text(
    st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n\ufeff"), min_size=1, max_size=12
).filter(_not_blank)


# One test function runs for every subclass: that is the point of the contract suite.
_CONTRACT_SETTINGS = settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.differing_executors]
)


# ---------------------------------------------------------------------------------------------
# The contract: every kind reads back exactly the documents written, however it is cut up.


class SourceContract:
    """Tests every source kind must pass; a subclass says how its format stores documents."""

    doc: ClassVar[Any] = st.text(_chars, min_size=1, max_size=30).filter(_not_blank)
    offsets_are_bytes: ClassVar[bool] = True  # errors carry a byte offset (else a row index)

    def source(self, **options: Any) -> Source:
        raise NotImplementedError

    def write(self, root: Path, docs: list[bytes]) -> None:
        """Store ``docs`` (the exact document bytes) under ``root`` in this format."""
        raise NotImplementedError

    def raw(self, root: Path) -> bytes:
        """The (decompressed) bytes the reader scans, for byte-offset checks."""
        raise NotImplementedError

    @_CONTRACT_SETTINGS
    @given(docs=st.data())
    def test_reads_back_the_documents_written(self, docs: st.DataObject) -> None:
        """Whatever documents are written come back, in order, as large_string arrays."""
        texts = docs.draw(st.lists(self.doc, max_size=8))
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp)
            self.write(root, [t.encode("utf-8") for t in texts])
            stats = ReadStats()
            assert read_all(self.source(), root, stats=stats) == texts
            assert stats.documents == len(texts)

    @_CONTRACT_SETTINGS
    @given(data=st.data(), target=st.integers(1, 64), batch=st.integers(1, 64))
    def test_documents_do_not_depend_on_plan_or_batch_size(self, data: st.DataObject, target: int, batch: int) -> None:
        """Cutting a file into parts of any target size and reading any batch size gives the same documents."""
        texts = data.draw(st.lists(self.doc, min_size=1, max_size=12))
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp)
            self.write(root, [t.encode("utf-8") for t in texts])
            assert read_all(self.source(), root, target_bytes=target, batch_bytes=batch) == texts

    @_CONTRACT_SETTINGS
    @given(data=st.data(), batch=st.integers(1, 256))
    def test_read_many_equals_reading_each_file(self, data: st.DataObject, batch: int) -> None:
        """Reading several files' parts with ``read_many`` gives the documents of reading each in
        turn, in order, the same stats, and how many documents each file gave."""
        groups = data.draw(st.lists(st.lists(self.doc, max_size=4), min_size=1, max_size=5))
        with tempfile.TemporaryDirectory() as tmp:
            parts = []
            for i, texts in enumerate(groups):
                (Path(tmp) / f"f{i}").mkdir()
                self.write(Path(tmp) / f"f{i}", [t.encode("utf-8") for t in texts])
                for path in sorted(p for p in (Path(tmp) / f"f{i}").rglob("*") if p.is_file()):
                    parts.extend((path, part) for part in self.source().plan(path, 1 << 30))
            one, many = ReadStats(), ReadStats()
            each = [
                [d for a in self.source().read(path, part, one, batch_bytes=batch) for d in a.to_pylist()]
                for path, part in parts
            ]
            counts: list[int] = []
            got = [d for a in self.source().read_many(parts, many, counts, batch_bytes=batch) for d in a.to_pylist()]
            assert got == [d for docs in each for d in docs] == [t for texts in groups for t in texts]
            assert counts == [len(docs) for docs in each] and one == many

    def test_oversize_policies(self, tmp_path: Path) -> None:
        """A document over max_document_bytes is refused, skipped or cut at a character boundary."""
        docs = ["short", "é" * 40, "tail"]  # the middle one is 80 bytes
        self.write(tmp_path, [d.encode() for d in docs])
        with pytest.raises(SourceError, match="max_document_bytes") as info:
            read_all(self.source(max_document_bytes=51), tmp_path)
        assert tmp_path in Path(info.value.path).parents
        stats = ReadStats()
        assert read_all(self.source(max_document_bytes=51, on_oversize="skip"), tmp_path, stats=stats) == [
            "short",
            "tail",
        ]
        assert stats.oversize_skipped == 1
        stats = ReadStats()
        # 51 bytes would cut the 26th "é" (2 bytes each): 25 whole ones are kept.
        got = read_all(self.source(max_document_bytes=51, on_oversize="truncate"), tmp_path, stats=stats)
        assert got == ["short", "é" * 25, "tail"]
        assert stats.oversize_truncated == 1

    def test_invalid_utf8_policies(self, tmp_path: Path) -> None:
        """Bytes that are not UTF-8 raise naming the file and place, become U+FFFD, or drop the document."""
        self.write(tmp_path, [b"good one", b"bad \xff byte", b"good two"])
        with pytest.raises(InvalidUtf8Error) as info:
            read_all(self.source(), tmp_path)
        assert tmp_path in Path(info.value.path).parents
        if self.offsets_are_bytes:
            # The offset Python's UTF-8 decoder reports for the whole stream (reference codec).
            with pytest.raises(UnicodeDecodeError) as ref:
                self.raw(tmp_path).decode("utf-8")
            assert info.value.offset == ref.value.start
        else:
            assert "row 1" in str(info.value)
        stats = ReadStats()
        got = read_all(self.source(on_invalid_utf8="replace"), tmp_path, stats=stats)
        assert got == ["good one", "bad \ufffd byte", "good two"]
        assert stats.invalid_utf8_replaced == 1
        stats = ReadStats()
        assert read_all(self.source(on_invalid_utf8="skip"), tmp_path, stats=stats) == ["good one", "good two"]
        assert stats.invalid_utf8_skipped == 1

    def test_line_ends_become_lf(self, tmp_path: Path) -> None:
        """CRLF and lone CR inside a document come out as LF."""
        if not self.multiline:
            pytest.skip("documents of this kind cannot hold a line end")
        self.write(tmp_path, [b"one\r\ntwo\rthree"])
        assert read_all(self.source(), tmp_path) == ["one\ntwo\nthree"]

    multiline: ClassVar[bool] = True

    def test_blank_documents_are_not_emitted(self, tmp_path: Path) -> None:
        """Documents holding only blanks are dropped; the others keep their order."""
        if not self.can_store_blank:
            pytest.skip("this format has no way to store a blank document")
        self.write(tmp_path, [b"first", b" \t ", b"", b"last"])
        assert read_all(self.source(), tmp_path) == ["first", "last"]

    can_store_blank: ClassVar[bool] = True

    def test_recipe_round_trip(self) -> None:
        """parse_source(source.to_dict()) rebuilds an equal source."""
        src = self.source(max_document_bytes=1000, on_oversize="skip")
        assert parse_source(src.to_dict(), "recipe.sources[0]") == src


class TestTextLines(SourceContract):
    doc = _line
    can_store_blank = False  # a blank line is a separator, not a document
    multiline = False

    def source(self, **options: Any) -> Source:
        return TextSource(paths="*.txt", document="line", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        (root / "a.txt").write_bytes(b"".join(d + b"\n" for d in docs))

    def raw(self, root: Path) -> bytes:
        return (root / "a.txt").read_bytes()


class TestTextParagraphs(SourceContract):
    doc = st.lists(_line, min_size=1, max_size=4).map("\n".join)
    can_store_blank = False

    def source(self, **options: Any) -> Source:
        return TextSource(paths="*.txt", document="paragraph", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        (root / "a.txt").write_bytes(b"\n\n".join(docs) + b"\n")

    def raw(self, root: Path) -> bytes:
        return (root / "a.txt").read_bytes()

    def test_line_ends_become_lf(self, tmp_path: Path) -> None:
        """CRLF and lone CR inside a paragraph come out as LF."""
        (tmp_path / "a.txt").write_bytes(b"one\r\ntwo\rthree\r\n\r\nfour")
        assert read_all(self.source(), tmp_path) == ["one\ntwo\nthree", "four"]


class TestTextFiles(SourceContract):
    """document = "file": one file per document."""

    def source(self, **options: Any) -> Source:
        return TextSource(paths="docs/*.txt", document="file", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        (root / "docs").mkdir()
        for i, doc in enumerate(docs):
            (root / "docs" / f"{i:04d}.txt").write_bytes(doc)
        (root / "docs" / "empty.txt").write_bytes(b"")  # sorts last; an empty file is no document

    def raw(self, root: Path) -> bytes:
        return (root / "docs" / "0001.txt").read_bytes()


class TestGzipLines(TestTextLines):
    """Line documents in a gzip file written by the stdlib (reference compressor)."""

    def source(self, **options: Any) -> Source:
        return TextSource(paths="*.txt.gz", document="line", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        (root / "a.txt.gz").write_bytes(gzip.compress(b"".join(d + b"\n" for d in docs)))

    def raw(self, root: Path) -> bytes:
        return gzip.decompress((root / "a.txt.gz").read_bytes())


class TestBz2Paragraphs(TestTextParagraphs):
    """Paragraph documents in a bz2 file written by the stdlib (reference compressor)."""

    def source(self, **options: Any) -> Source:
        return TextSource(paths="*.txt.bz2", document="paragraph", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        (root / "a.txt.bz2").write_bytes(bz2.compress(b"\n\n".join(docs) + b"\n"))

    def raw(self, root: Path) -> bytes:
        return bz2.decompress((root / "a.txt.bz2").read_bytes())

    def test_line_ends_become_lf(self, tmp_path: Path) -> None:
        """CRLF and lone CR inside a compressed paragraph come out as LF."""
        (tmp_path / "a.txt.bz2").write_bytes(bz2.compress(b"one\r\ntwo\rthree\r\n\r\nfour"))
        assert read_all(self.source(), tmp_path) == ["one\ntwo\nthree", "four"]


def _json_line(doc: bytes) -> bytes:
    try:
        return json.dumps({"text": doc.decode("utf-8"), "n": 1}, ensure_ascii=False).encode("utf-8")
    except UnicodeDecodeError:
        # json cannot write invalid UTF-8, so splice the raw bytes into a string literal.
        return b'{"text": "' + doc + b'"}'


class TestJsonl(SourceContract):
    def source(self, **options: Any) -> Source:
        return JsonlSource(paths="*.jsonl", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        (root / "a.jsonl").write_bytes(b"".join(_json_line(d) + b"\n" for d in docs))

    def raw(self, root: Path) -> bytes:
        return (root / "a.jsonl").read_bytes()


class TestJsonlZstd(TestJsonl):
    """JSON Lines compressed with pyarrow's zstd codec."""

    def source(self, **options: Any) -> Source:
        return JsonlSource(paths="*.jsonl.zst", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        with pa.CompressedOutputStream(str(root / "a.jsonl.zst"), "zstd") as sink:
            sink.write(b"".join(_json_line(d) + b"\n" for d in docs))

    def raw(self, root: Path) -> bytes:
        with pa.input_stream(str(root / "a.jsonl.zst"), compression="zstd") as stream:
            data: bytes = stream.read()
        return data


def _string_array(docs: list[bytes]) -> pa.Array:
    # Built from buffers so invalid UTF-8 can be stored, as a foreign writer might.
    binary = pa.array(docs, type=pa.binary())
    return pa.Array.from_buffers(pa.string(), len(binary), binary.buffers())


class TestParquet(SourceContract):
    offsets_are_bytes = False

    def source(self, **options: Any) -> Source:
        return ParquetSource(paths="*.parquet", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        table = pa.table({"id": pa.array(range(len(docs))), "text": _string_array(docs)})
        pq.write_table(table, root / "a.parquet", row_group_size=3)


class TestArrowIpc(SourceContract):
    offsets_are_bytes = False

    def source(self, **options: Any) -> Source:
        return ArrowSource(paths="*.arrow", **options)

    def write(self, root: Path, docs: list[bytes]) -> None:
        table = pa.table({"text": _string_array(docs), "id": pa.array(range(len(docs)))})
        with pa.OSFile(str(root / "a.arrow"), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
            writer.write_table(table, max_chunksize=3)


# ---------------------------------------------------------------------------------------------
# Text: the streaming reader against a plain line-by-line definition of the same documents.

_RAW_TOKENS = [
    b"a",
    b"b",
    b"\xc3\xa9",
    b"\xe2\x82\xac",
    b" ",
    b"\t",
    b"\x0b",
    b"\n",
    b"\r",
    b"\r\n",
    b"\xef\xbb\xbf",
    b"\xff",
    b"\xe2\x82",
    b"\x00",
    b"\x80",
]
_raw_text = st.lists(st.sampled_from(_RAW_TOKENS), max_size=80).map(b"".join)


def _lines(data: bytes) -> list[tuple[bytes, bytes]]:
    """(content, line end) pairs, scanning one byte at a time (CRLF, CR and LF end a line)."""
    out, start, i = [], 0, 0
    while i < len(data):
        if data[i : i + 1] in (b"\r", b"\n"):
            end = i + 2 if data[i : i + 2] == b"\r\n" else i + 1
            out.append((data[start:i], data[i:end]))
            start = i = end
        else:
            i += 1
    if start < len(data):
        out.append((data[start:], b""))
    return out


def oracle(data: bytes, mode: str, limit: int, oversize: str, stats: ReadStats) -> list[str]:
    """The documents of ``data`` by the definition in seqpipe.sources.text, computed naively."""
    from seqpipe.sources.base import truncate_utf8

    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]

    def blank(b: bytes) -> bool:
        return b.strip(b" \t\x0b\x0c\r\n") == b""

    if mode == "file":
        raws = [] if blank(data) else [data]
    elif mode == "line":
        raws = [c for c, _ in _lines(data) if not blank(c)]
    else:
        raws, run = [], []
        for content, end in [*_lines(data), (b"", b"")]:
            if blank(content):
                if run:
                    raws.append(b"".join(c + e for c, e in run[:-1]) + run[-1][0])
                run = [] if blank(content) else run
            else:
                run.append((content, end))
    out = []
    for raw in raws:
        if len(raw) > limit:
            if oversize == "skip":
                stats.oversize_skipped += 1
                continue
            stats.oversize_truncated += 1
            raw = bytes(truncate_utf8(raw, limit))
        text = raw.decode("utf-8", "replace")
        if text != raw.decode("utf-8", "ignore"):
            stats.invalid_utf8_replaced += 1
        text = text.replace("\r\n", "\n").replace("\r", "\n")
        if text.strip(BLANKS):
            out.append(text)
    return out


@settings(max_examples=300, deadline=None)
@given(
    data=_raw_text,
    mode=st.sampled_from(["line", "paragraph", "file"]),
    target=st.integers(1, 40),
    batch=st.integers(1, 40),
    limit=st.sampled_from([1, 2, 3, 5, 8, 1000]),
    oversize=st.sampled_from(["skip", "truncate"]),
)
def test_text_reader_matches_a_naive_definition(
    data: bytes, mode: str, target: int, batch: int, limit: int, oversize: str
) -> None:
    """Hostile bytes (CR, CRLF, BOMs, blanks, bad UTF-8, oversize lines) give the naive scanner's documents."""
    want_stats, got_stats = ReadStats(), ReadStats()
    want = oracle(data, mode, limit, oversize, want_stats)
    with tempfile.TemporaryDirectory() as tmp:
        (Path(tmp) / "a.txt").write_bytes(data)
        src = TextSource(
            paths="a.txt", document=mode, on_invalid_utf8="replace", max_document_bytes=limit, on_oversize=oversize
        )
        got = read_all(src, Path(tmp), target_bytes=target, batch_bytes=batch, stats=got_stats)
    assert got == want
    for name in ("oversize_skipped", "oversize_truncated", "invalid_utf8_replaced"):
        assert getattr(got_stats, name) == getattr(want_stats, name), name
    assert got_stats.documents == len(want)
    assert got_stats.bytes_read == len(data)


def test_truncate_utf8_keeps_whole_characters() -> None:
    """Truncation keeps the longest prefix of whole characters that fits (checked with Python's encoder)."""
    from seqpipe.sources.base import truncate_utf8

    text = "aé€😀" * 3  # 1-, 2-, 3- and 4-byte characters
    data = text.encode("utf-8")
    for limit in range(len(data) + 1):
        want = max((text[:n] for n in range(len(text) + 1) if len(text[:n].encode()) <= limit), key=len)
        assert bytes(truncate_utf8(data, limit)).decode("utf-8") == want


def test_paragraphs_are_separated_by_lines_of_blanks(tmp_path: Path) -> None:
    """A line of spaces and tabs separates paragraphs; indentation and trailing spaces are kept."""
    (tmp_path / "a.txt").write_bytes(b"\n \n  first line  \nsecond\n \t \n\n third\n  \n")
    assert read_all(TextSource(paths="a.txt", document="paragraph"), tmp_path) == ["  first line  \nsecond", " third"]


def test_plan_cuts_on_document_boundaries(tmp_path: Path) -> None:
    """Every part but the first starts right after a line end (line mode) or a blank line (paragraph)."""
    data = b"".join(b"entry %d\r\nmore\n\n" % i for i in range(200))
    (tmp_path / "a.txt").write_bytes(data)
    for mode, ends in (("line", (b"\n", b"\r")), ("paragraph", (b"\n\n",))):
        parts = TextSource(paths="a.txt", document=mode).plan(tmp_path / "a.txt", 100)
        assert len(parts) > 10
        assert parts[0].start == 0 and parts[-1].stop == len(data)
        for before, after in itertools.pairwise(parts):
            assert before.stop == after.start
            assert data[: after.start].endswith(ends)


def test_compressed_sources_are_cut_in_the_decompressed_stream(tmp_path: Path) -> None:
    """A compressed file is cut into parts of its decompressed stream that read as the whole file; a
    file-mode document is one part."""
    (tmp_path / "a.txt.gz").write_bytes(gzip.compress(b"".join(b"x%d\n" % i for i in range(10000))))
    (tmp_path / "b.txt").write_bytes(b"x\n" * 10000)
    source = TextSource(paths="*", document="line")
    parts = source.plan(tmp_path / "a.txt.gz", 1000)
    assert len(parts) > 50 and parts[0].start == 0 and parts[-1].stop is None
    docs = [d for part in parts for a in source.read(tmp_path / "a.txt.gz", part, ReadStats()) for d in a.to_pylist()]
    assert docs == [f"x{i}" for i in range(10000)]
    assert len(TextSource(paths="*", document="file").plan(tmp_path / "b.txt", 10)) == 1
    assert len(TextSource(paths="*", document="line").plan(tmp_path / "b.txt", 10)) > 1


def test_compression_can_be_named_or_turned_off(tmp_path: Path) -> None:
    """compression = "gzip" reads a file without the suffix; "none" reads a .gz file's raw bytes."""
    (tmp_path / "a.dat").write_bytes(gzip.compress(b"one\ntwo\n"))
    (tmp_path / "b.gz").write_bytes(gzip.compress(b"one\n"))
    assert read_all(TextSource(paths="a.dat", document="line", compression="gzip"), tmp_path) == ["one", "two"]
    with pytest.raises(InvalidUtf8Error) as info:
        read_all(TextSource(paths="b.gz", document="line", compression="none"), tmp_path)
    # RFC 1952 section 2.3.1: a gzip member starts 0x1f 0x8b, and 0x8b cannot start a UTF-8 sequence.
    assert info.value.offset == 1


def test_long_single_line_keeps_memory_bounded(tmp_path: Path) -> None:
    """A 50 MB line in line mode costs about max_document_bytes + batch_bytes when over the limit,
    and about twice the line (buffer + decoded text) when within it, as traced by tracemalloc."""
    import pyarrow.compute as pc

    path = tmp_path / "long.txt"
    block = b"ferry " * (1 << 16)
    with path.open("wb") as sink:
        for _ in range(50_000_000 // len(block) + 1):
            sink.write(block)
        sink.write(b"\nthe next line\n")
    size = path.stat().st_size
    limit, batch = 1 << 20, 256 << 10
    cases = [
        ("truncate", limit, [limit, 13], 4 * (limit + batch)),
        ("skip", limit, [13], 4 * (limit + batch)),
        ("error", 64 << 20, [size - 15, 13], 2.5 * size),
    ]
    for policy, max_bytes, want, bound in cases:
        src = TextSource(paths="long.txt", document="line", max_document_bytes=max_bytes, on_oversize=policy)
        stats = ReadStats()
        lengths: list[int] = []
        tracemalloc.start()
        try:
            for part in src.plan(path, 1 << 40):
                for array in src.read(path, part, stats, batch_bytes=batch):
                    lengths.extend(pc.binary_length(array).to_pylist())
                    if policy == "truncate" and lengths[0] == limit:
                        assert array[0].as_py() == (b"ferry " * (limit // 6 + 1))[:limit].decode()
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
        assert lengths == want, policy
        assert stats.bytes_read == size
        assert peak < bound, (policy, peak)


# ---------------------------------------------------------------------------------------------
# JSON Lines

_BAD_RECORDS = [
    (json.dumps({"title": "no text"}), "no field 'text'"),
    (json.dumps({"text": 42}), "'text' is int"),
    ('{"text": "cut off', "not valid JSON"),
    (json.dumps({"text": None}), "'text' is null"),
    (json.dumps([1, 2]), "expected a JSON object"),
    ('{"text": "\\ud800"}', "unpaired surrogate"),
]


@pytest.mark.parametrize(("line", "problem"), _BAD_RECORDS)
def test_jsonl_bad_record_names_file_and_line(tmp_path: Path, line: str, problem: str) -> None:
    """A bad record raises RecordError naming the file and its 1-based line, or is skipped and counted."""
    good = json.dumps({"text": "fine"})
    (tmp_path / "a.jsonl").write_text(f"{good}\n\n{line}\n{good}\n", encoding="utf-8")
    with pytest.raises(RecordError, match=problem) as info:
        read_all(JsonlSource(paths="a.jsonl"), tmp_path)
    assert info.value.line == 3
    assert info.value.path == str(tmp_path / "a.jsonl")
    stats = ReadStats()
    assert read_all(JsonlSource(paths="a.jsonl", on_bad_record="skip"), tmp_path, stats=stats) == ["fine"] * 2
    assert stats.bad_records_skipped == 1


def test_jsonl_line_numbers_count_lines_before_the_part(tmp_path: Path) -> None:
    """An error in a later part still names the line number in the whole file."""
    lines = [json.dumps({"text": f"record {i}"}) for i in range(500)]
    lines[437] = "{broken"
    (tmp_path / "a.jsonl").write_text("\n".join(lines) + "\n", encoding="utf-8")
    src = JsonlSource(paths="a.jsonl")
    assert len(src.plan(tmp_path / "a.jsonl", 1000)) > 5
    with pytest.raises(RecordError) as info:
        read_all(src, tmp_path, target_bytes=1000, batch_bytes=64)
    assert info.value.line == 438


@pytest.mark.parametrize("batch", [64, 1 << 20])
def test_jsonl_huge_line_is_judged_without_parsing(tmp_path: Path, batch: int) -> None:
    """A line far over the size limit is refused or skipped without being held whole, at any batch size."""
    huge = json.dumps({"text": "x" * 300_000})
    (tmp_path / "a.jsonl").write_text(f'{{"text": "a"}}\n{huge}\n{{"text": "b"}}\n', encoding="utf-8")
    with pytest.raises(SourceError, match="max_document_bytes") as info:
        read_all(JsonlSource(paths="a.jsonl", max_document_bytes=1000), tmp_path, batch_bytes=batch)
    assert info.value.line == 2
    for policy in ("skip", "truncate"):
        stats = ReadStats()
        src = JsonlSource(paths="a.jsonl", max_document_bytes=1000, on_oversize=policy)
        assert read_all(src, tmp_path, batch_bytes=batch, stats=stats) == ["a", "b"]
        assert stats.oversize_skipped == 1


def test_jsonl_accepts_crlf_and_a_leading_bom(tmp_path: Path) -> None:
    """CR before LF is JSON whitespace (RFC 8259 section 2) and a BOM at file start is dropped."""
    (tmp_path / "a.jsonl").write_bytes(b'\xef\xbb\xbf{"text": "one"}\r\n{"text": "two\\r\\nlines"}\r\n')
    assert read_all(JsonlSource(paths="a.jsonl"), tmp_path) == ["one", "two\nlines"]


# ---------------------------------------------------------------------------------------------
# Parquet and Arrow IPC


def _write_arrow(path: Path, table: pa.Table) -> None:
    with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table, max_chunksize=2)


@pytest.mark.parametrize("kind", ["parquet", "arrow"])
def test_columnar_column_must_exist_and_hold_text(tmp_path: Path, kind: str) -> None:
    """A missing or non-string column is a RecordError naming the file and the column."""
    table = pa.table({"body": ["a", "b"], "n": [1, 2]})
    path = tmp_path / f"a.{kind}"
    pq.write_table(table, path) if kind == "parquet" else _write_arrow(path, table)
    src_cls = SOURCE_KINDS[kind]
    with pytest.raises(RecordError, match="no column 'text'") as info:
        read_all(src_cls(paths=f"*.{kind}"), tmp_path)
    assert info.value.path == str(path)
    with pytest.raises(RecordError, match="column 'n' has type int64"):
        read_all(src_cls(paths=f"*.{kind}", field="n"), tmp_path)
    assert read_all(src_cls(paths=f"*.{kind}", field="body"), tmp_path) == ["a", "b"]


@pytest.mark.parametrize("kind", ["parquet", "arrow"])
def test_columnar_nulls_follow_bad_records(tmp_path: Path, kind: str) -> None:
    """A null text value raises naming its row index, or is skipped and counted."""
    table = pa.table({"text": ["a", "b", None, "d", None]})
    path = tmp_path / f"a.{kind}"
    pq.write_table(table, path, row_group_size=2) if kind == "parquet" else _write_arrow(path, table)
    with pytest.raises(RecordError, match="row 2: field 'text' is null"):
        read_all(SOURCE_KINDS[kind](paths="*"), tmp_path)
    stats = ReadStats()
    assert read_all(SOURCE_KINDS[kind](paths="*", on_bad_record="skip"), tmp_path, stats=stats) == ["a", "b", "d"]
    assert stats.bad_records_skipped == 2


@settings(max_examples=100, deadline=None)
@given(docs=st.lists(st.text(st.sampled_from("ab \t\r\n\x0bé"), max_size=8), max_size=10))
def test_columnar_fast_and_per_value_paths_agree(docs: list[str]) -> None:
    """The pyarrow-compute path and the per-value path give the same documents."""
    from seqpipe.sources._columnar import finish_column
    from seqpipe.sources.base import DocumentFinisher

    src = ArrowSource(paths="x", on_bad_record="skip")
    fast = finish_column(pa.array(docs, pa.string()), 0, src, DocumentFinisher(src, Path("x"), ReadStats()))
    # A trailing null sends the batch down the per-value path; skip drops the null again.
    slow = finish_column(pa.array([*docs, None], pa.string()), 0, src, DocumentFinisher(src, Path("x"), ReadStats()))
    assert fast.to_pylist() == slow.to_pylist()
    assert fast.type == slow.type == pa.large_string()


@pytest.mark.parametrize("kind", ["parquet", "arrow"])
def test_columnar_file_of_another_format_is_a_source_error(tmp_path: Path, kind: str) -> None:
    """A file that is not Parquet / an Arrow IPC file raises SourceError naming it."""
    (tmp_path / f"a.{kind}").write_bytes(b"just some text\n")
    with pytest.raises(SourceError) as info:
        read_all(SOURCE_KINDS[kind](paths="*"), tmp_path)
    assert info.value.path == str(tmp_path / f"a.{kind}")


# ---------------------------------------------------------------------------------------------
# Resolving globs and parsing recipe tables


def test_resolve_sorts_by_relative_path_and_drops_repeats(tmp_path: Path) -> None:
    """Files from several globs come once each, sorted by relative POSIX path; directories are ignored."""
    for rel in ("b/2.txt", "a/9.txt", "a/deep/1.txt", "c.txt", "dir.txt/x.md"):
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_text("x")
    src = TextSource(paths=["**/*.txt", "a/*.txt", "c.txt", "./c.txt"])
    got = [p.relative_to(tmp_path).as_posix() for p in src.resolve(tmp_path)]
    assert got == ["a/9.txt", "a/deep/1.txt", "b/2.txt", "c.txt"]


def test_resolve_names_a_glob_that_matches_nothing(tmp_path: Path) -> None:
    """A glob with no match raises SourceMissingError (a FileNotFoundError) naming the glob and root."""
    (tmp_path / "a.txt").write_text("x")
    with pytest.raises(SourceMissingError, match=r"'logs/\*\.txt' matched no file") as info:
        TextSource(paths=["a.txt", "logs/*.txt"]).resolve(tmp_path)
    assert isinstance(info.value, FileNotFoundError)
    assert str(tmp_path) in str(info.value)


@pytest.mark.parametrize(
    ("table", "key", "shown"),
    [
        ({"kind": "txt", "paths": "x"}, "recipe.sources[1].kind", "'text', 'jsonl', 'parquet', 'arrow'"),
        ({"paths": "x"}, "recipe.sources[1].kind", "missing"),
        ({"kind": "text"}, "recipe.sources[1].paths", "missing"),
        ({"kind": "text", "paths": 5}, "recipe.sources[1].paths", "5"),
        ({"kind": "text", "paths": "x", "on_invalid_utf8": "ignore"}, "recipe.sources[1].on_invalid_utf8", "'ignore'"),
        ({"kind": "text", "paths": "x", "document": "lines"}, "recipe.sources[1].document", "did you mean 'line'"),
        ({"kind": "jsonl", "paths": "x", "on_bad_record": "drop"}, "recipe.sources[1].on_bad_record", "'drop'"),
        ({"kind": "arrow", "paths": "x", "max_document_bytes": 0}, "recipe.sources[1].max_document_bytes", "0"),
        ({"kind": "parquet", "paths": "x", "compression": "gzip"}, "recipe.sources[1].compression", "unknown key"),
    ],
)
def test_parse_source_errors_name_key_and_value(table: dict[str, Any], key: str, shown: str) -> None:
    """Invalid recipe tables raise RecipeError naming the key path and the bad value or the choices."""
    with pytest.raises(RecipeError) as info:
        parse_source(table, "recipe.sources[1]")
    assert info.value.key == key
    assert shown in str(info.value)


def test_source_kinds_are_the_four_documented() -> None:
    """SOURCE_KINDS maps each recipe kind to its class."""
    assert {k: v.kind for k, v in SOURCE_KINDS.items()} == {k: k for k in ("text", "jsonl", "parquet", "arrow")}


# ---------------------------------------------------------------------------------------------
# The committed hostile fixtures


def _text(name: str, mode: str, **options: Any) -> tuple[list[str], ReadStats]:
    stats = ReadStats()
    return read_all(TextSource(paths=name, document=mode, **options), HOSTILE, stats=stats), stats


def test_hostile_fixtures_regenerate_identically(tmp_path: Path) -> None:
    """scripts/make_hostile_fixtures.py rebuilds the committed files byte for byte."""
    spec = importlib.util.spec_from_file_location("make_hostile", ROOT / "scripts" / "make_hostile_fixtures.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    fresh = {p.name: p.read_bytes() for p in module.build(tmp_path)}
    committed = {p.name: p.read_bytes() for p in HOSTILE.iterdir() if p.is_file()}
    assert fresh == committed


@pytest.mark.parametrize("mode", ["line", "paragraph", "file"])
def test_hostile_invalid_utf8(mode: str) -> None:
    """invalid_utf8.txt: the error names the file and the first bad byte; replace and skip count documents."""
    data = (HOSTILE / "invalid_utf8.txt").read_bytes()
    with pytest.raises(InvalidUtf8Error) as info:
        _text("invalid_utf8.txt", mode)
    assert info.value.offset == data.index(b"\xff")
    assert "invalid_utf8.txt" in str(info.value)
    docs, stats = _text("invalid_utf8.txt", mode, on_invalid_utf8="replace")
    assert "".join(docs).count("\ufffd") == 2  # the stray byte and the cut-off euro sign
    assert stats.invalid_utf8_replaced == {"line": 2, "paragraph": 1, "file": 1}[mode]
    docs, stats = _text("invalid_utf8.txt", mode, on_invalid_utf8="skip")
    assert docs == {"line": ["a clean first line", "a clean last line"], "paragraph": [], "file": []}[mode]
    assert stats.invalid_utf8_skipped == {"line": 2, "paragraph": 1, "file": 1}[mode]


def test_hostile_binary_file() -> None:
    """binary.bin: the first byte >= 0x80 is the error offset (RFC 3629: 0x80-0xBF never start a character)."""
    data = (HOSTILE / "binary.bin").read_bytes()
    for mode in ("line", "paragraph", "file"):
        with pytest.raises(InvalidUtf8Error) as info:
            _text("binary.bin", mode)
        assert info.value.offset == data.index(b"\x80") == 128
    docs, stats = _text("binary.bin", "line", on_invalid_utf8="skip")
    assert docs == ["".join(map(chr, range(10)))]  # bytes 0..9, before the first LF
    assert stats.invalid_utf8_skipped == 4


def test_hostile_nul_bom_and_line_ends() -> None:
    """NUL is kept, a leading BOM dropped, a later BOM kept as U+FEFF, CR-only and CRLF lines split."""
    assert _text("nul_bytes.txt", "line")[0] == ["crossing\x00one", "second\x00\x00line", "\x00"]
    assert _text("bom_start.txt", "line")[0] == ["first line after a byte order mark", "second line"]
    assert _text("bom_middle.txt", "line")[0] == ["before the mark", "\ufeffafter the mark"]
    assert _text("cr_only.txt", "line")[0] == ["one", "two", "three", "four"]
    assert _text("cr_only.txt", "paragraph")[0] == ["one\ntwo", "three\nfour"]
    assert _text("crlf.txt", "paragraph")[0] == ["alpha\nbeta", "gamma"]
    assert _text("crlf.txt", "file")[0] == ["alpha\nbeta\n\ngamma\n"]


@pytest.mark.parametrize("name", ["empty.txt", "whitespace_only.txt"])
@pytest.mark.parametrize("mode", ["line", "paragraph", "file"])
def test_hostile_empty_files_give_no_documents(name: str, mode: str) -> None:
    """An empty or blank-only file yields no document and no error."""
    docs, stats = _text(name, mode)
    assert docs == [] and stats.documents == 0


@pytest.mark.parametrize("name", ["truncated.txt.gz", "truncated.txt.zst"])
def test_hostile_truncated_compressed_file(name: str) -> None:
    """A truncated gzip / zstd file raises SourceError naming the file."""
    with pytest.raises(SourceError, match="truncated or corrupt") as info:
        _text(name, "line", on_invalid_utf8="replace")
    assert info.value.path == str(HOSTILE / name)


def test_hostile_records() -> None:
    """records.jsonl: the first bad record is line 2; with skip the two good ones remain and five are counted."""
    with pytest.raises(RecordError) as info:
        read_all(JsonlSource(paths="records.jsonl"), HOSTILE)
    assert info.value.line == 2
    stats = ReadStats()
    assert read_all(JsonlSource(paths="records.jsonl", on_bad_record="skip"), HOSTILE, stats=stats) == [
        "first good record",
        "last good record",
    ]
    assert stats.bad_records_skipped == 5


def test_local_suffix_is_the_suffix_a_path_gives() -> None:
    """The compression suffix of a local ``str`` path, found without a ``Path``, is
    ``PurePath.suffix`` of it (dot files, dots in directories, "." components, trailing "/")."""
    from pathlib import PurePath

    from seqpipe.sources._stream import _suffix, codec_for

    names = ["a.gz", "..gz", ".gz", "a/b.tar.gz", "a.", "x/y/", "a/.hidden", "a/b.c/d", "./c.zst", "a..gz"]
    names += ["dir.gz/", "a/./b.bz2", ".", "x/..", "a/b/.", "/x/y.GZ", "y.gz/.", "notes/box-1/n.txt"]
    names += ["a/b.Zst", "a/.gz/c", "a.gz.txt", "b.bz2", "c.tar.BZ2", "gz", "a/gz", "x.tgz"]
    for name in names:
        assert _suffix(name) == PurePath(name).suffix, name
        want = {".gz": "gzip", ".bz2": "bz2", ".zst": "zstd"}.get(PurePath(name).suffix.lower())
        assert codec_for(name, "auto") == want, name


@pytest.mark.parametrize("size_over", [0, 1])
def test_jsonl_small_file_planned_from_its_size_as_plan_would(tmp_path: Path, size_over: int) -> None:
    """A JSON Lines file no larger than the part size is planned from its size alone as
    ``plan`` plans it; a larger or compressed one is left to ``plan``."""
    path = tmp_path / "a.jsonl"
    path.write_text("".join(json.dumps({"text": f"ferry {i}"}) + "\n" for i in range(7)))
    source = JsonlSource(paths="a.jsonl")
    size = path.stat().st_size
    target = size - size_over
    sized = source.plan_sized(str(path), size, target)
    if size_over:
        assert sized is None
    else:
        assert sized == source.plan(str(path), target)
    assert source.plan_sized(str(path) + ".gz", 10, 100) is None
