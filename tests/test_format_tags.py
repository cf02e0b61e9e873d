"""Every file seqpipe writes carries a format tag of one style, "seqpipe.<thing>/<N>", and readers
refuse a file whose tag is not the one they read (an older build) with advice to rebuild."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pyarrow as pa
import pytest
from conftest import build_dir, write_project

from seqpipe.dataset import open_dataset
from seqpipe.errors import ShardCorruptError
from seqpipe.formats import DOCUMENTS_FORMAT
from seqpipe.ingest import PART_FORMAT
from seqpipe.manifest import FORMAT
from seqpipe.report.core import REPORT_FORMAT
from seqpipe.shards import SHARD_FORMAT, read_shard
from seqpipe.tokenizers.bpe import MERGES_FORMAT
from seqpipe.vocab import VOCAB_FORMAT, Vocabulary

TAG = re.compile(r"^seqpipe\.[a-z]+/[1-9][0-9]*$")


def test_every_format_tag_has_the_one_style() -> None:
    """Manifest, report, cached part, shard, documents, vocabulary and merge tags all read seqpipe.<thing>/<N>."""
    tags = [FORMAT, REPORT_FORMAT, PART_FORMAT, SHARD_FORMAT, DOCUMENTS_FORMAT, VOCAB_FORMAT, MERGES_FORMAT]
    assert [t for t in tags if not TAG.match(t)] == []
    assert len({t.split("/")[0] for t in tags}) == len(tags)  # one thing per tag


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small dataset built once for the module."""
    root = tmp_path_factory.mktemp("tags")
    return build_dir(write_project(root / "src", files=2, paragraphs=10), root / "dataset")


def _meta(path: Path) -> dict[bytes, bytes]:
    return dict(pa.ipc.open_file(str(path)).schema.metadata or {})


def test_built_files_carry_their_tags(built: Path) -> None:
    """Shards, documents tables and the vocabulary of a build carry seqpipe.format with their own tag."""
    shards = sorted((built / "shards").rglob("*.arrow"))
    documents = sorted((built / "documents").glob("*.arrow"))
    assert shards and documents
    assert {_meta(p)[b"seqpipe.format"] for p in shards} == {SHARD_FORMAT.encode()}
    assert {_meta(p)[b"seqpipe.format"] for p in documents} == {DOCUMENTS_FORMAT.encode()}
    assert _meta(built / "vocab.arrow")[b"seqpipe.format"] == VOCAB_FORMAT.encode()


def _retag(path: Path, tag: bytes) -> None:
    """Rewrite an Arrow file with another seqpipe.format value (content unchanged)."""
    table = pa.ipc.open_file(pa.py_buffer(path.read_bytes())).read_all()
    table = table.replace_schema_metadata({**(table.schema.metadata or {}), b"seqpipe.format": tag})
    with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)


def test_shard_of_an_old_format_is_refused(built: Path, tmp_path: Path) -> None:
    """A shard tagged with the old format ("1") is refused with the tag it has, the one read, and what to do."""
    shard = Path(shutil.copy(sorted((built / "shards").rglob("*.arrow"))[0], tmp_path / "old.arrow"))
    _retag(shard, b"1")
    with pytest.raises(ShardCorruptError, match=r"'1'.*seqpipe\.shard/2.*rebuild"):
        read_shard(shard)


def test_documents_table_of_an_old_format_is_refused(built: Path, tmp_path: Path) -> None:
    """A documents table tagged otherwise is not read as one."""
    d = Path(shutil.copytree(built, tmp_path / "dataset"))
    _retag(d / "documents" / "train.arrow", b"seqpipe.documents/1")
    with pytest.raises(ShardCorruptError, match=r"seqpipe\.documents/2"):
        _ = open_dataset(d).split("train").documents


def test_vocabulary_of_an_old_format_is_refused(built: Path, tmp_path: Path) -> None:
    """A vocabulary file tagged with the old format is refused."""
    path = Path(shutil.copy(built / "vocab.arrow", tmp_path / "vocab.arrow"))
    _retag(path, b"1")
    with pytest.raises(ShardCorruptError, match=r"seqpipe\.vocabulary/2"):
        Vocabulary.load(path)
