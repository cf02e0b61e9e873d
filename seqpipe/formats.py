"""What a dataset directory holds, by name and schema: shared by the builder and every reader.

Readers (``dataset.py``, ``verify.py``, the remote copy) and the builder import these from here,
so neither depends on the other. The manifest's own name and schema live in ``manifest.py``::

    manifest.json               the manifest (seqpipe/manifest.py), written last
    vocab.arrow                 the vocabulary
    tokenizer.arrow             learned tokenizer state, for the kinds that have some
    documents/<split>.arrow     one row per document: DOCS_SCHEMA
    shards/<split>/<k>.arrow    token ids, k counted from 000000
    .seqpipe/                   the builder's private area (lock, staging, cache); never published
"""

from __future__ import annotations

from typing import Final

import pyarrow as pa

PRIVATE: Final = ".seqpipe"
VOCAB_FILE: Final = "vocab.arrow"
# top-level files only some tokenizers write: a publish removes them when the new build has none
OPTIONAL_TOP: Final = ("tokenizer.arrow",)
DOCS_DIR: Final = "documents"
DOCUMENTS_FORMAT: Final = "seqpipe.documents/2"
SHARDS_DIR: Final = "shards"

# per document of a split: its first token's offset in the split's stream, its length in tokens
# (markers included), the input file it came from (index into the manifest's inputs) and the
# XXH3-128 of its cleaned text
DOCS_SCHEMA: Final = pa.schema(
    [("start", pa.int64()), ("length", pa.int64()), ("input", pa.int32()), ("hash", pa.binary(16))],
    metadata={b"seqpipe.table": b"documents", b"seqpipe.format": DOCUMENTS_FORMAT.encode()},
)


def docs_path(split: str) -> str:
    """The documents table of ``split``, relative to the dataset directory."""
    return f"{DOCS_DIR}/{split}.arrow"


def shard_path(split: str, number: int) -> str:
    """Shard ``number`` of ``split``, relative to the dataset directory."""
    return f"{SHARDS_DIR}/{split}/{number:06d}.arrow"


# the keys of the manifest's ``environment`` object (seqpipe/_environment.py fills it)
ENVIRONMENT_KEYS: Final = ("numpy", "pyarrow", "python", "regex", "unicode")
