"""Open a built dataset: manifest checked, shards memory-mapped, splits as token streams.

Opening reads only the manifest; a split's shards are mapped when the split is first asked
for, and its stream is a view over them (no concatenated copy). Every path comes from the
manifest and must stay inside the dataset directory.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from seqpipe.clean import parse_step
from seqpipe.errors import DatasetError, IntegrityError, ManifestError, ShardCorruptError
from seqpipe.formats import DOCS_SCHEMA, DOCUMENTS_FORMAT
from seqpipe.manifest import read_manifest, safe_relative
from seqpipe.shards import read_shard, read_table
from seqpipe.tokenizers import parse_tokenizer
from seqpipe.tokenizers.base import Encoder
from seqpipe.vocab import Vocabulary

if TYPE_CHECKING:
    from seqpipe.evaluation import Evaluation
    from seqpipe.stream import TokenStream
    from seqpipe.windows import BatchStream


def _check_ids(ids: np.ndarray, entries: int, rel: str) -> None:
    """Refuse a shard holding an id the vocabulary does not have (one pass over the shard, in C,
    once when the split is opened): a model would index past its embedding table with it."""
    if len(ids) and entries <= np.iinfo(ids.dtype).max and int(ids.max()) >= entries:
        raise ShardCorruptError(
            f"{rel}: holds id {int(ids.max())}, but the vocabulary has {entries} entries (ids 0..{entries - 1}); "
            "run 'seqpipe verify' on the dataset, then rebuild it",
            path=rel,
        )


@dataclass
class Split:
    """One split of a dataset: its token stream over the mapped shards and its documents."""

    dataset: Dataset
    name: str
    info: dict[str, Any] = field(repr=False)

    @property
    def num_tokens(self) -> int:
        return int(self.info["tokens"])

    @property
    def num_documents(self) -> int:
        return int(self.info["documents"])

    @cached_property
    def documents(self) -> pa.Table:
        """Per document: start (offset in the split's stream), length, input, hash."""
        rel = self.info["document_table"]["path"]
        table = read_table(
            safe_relative(self.dataset.directory, rel, key=f"splits.{self.name}.document_table.path"), full=True
        )
        try:
            meta = table.schema.metadata or {}
            same = table.schema.equals(DOCS_SCHEMA) and meta.get(b"seqpipe.format") == DOCUMENTS_FORMAT.encode()
        except (UnicodeDecodeError, pa.ArrowException):
            same = False
        if not same or any(c.null_count for c in table.columns):
            raise ShardCorruptError(
                f"{rel}: not a documents table (expected format {DOCUMENTS_FORMAT}: columns start, length, input, "
                "hash without nulls)",
                path=rel,
            )
        if table.num_rows != self.num_documents:
            raise DatasetError(f"{rel}: holds {table.num_rows} documents, manifest says {self.num_documents}")
        return table

    @cached_property
    def stream(self) -> TokenStream:
        """The split's tokens as one logical stream (memory-mapped, zero-copy)."""
        from seqpipe.stream import TokenStream

        dtype = np.dtype(self.dataset.manifest["dtype"])
        chunks = []
        for j, sh in enumerate(self.info["shards"]):
            path = safe_relative(self.dataset.directory, sh["path"], key=f"splits.{self.name}.shards[{j}].path")
            chunks.append(read_shard(path, dtype=dtype, expected_tokens=sh["tokens"]))
            _check_ids(chunks[-1], int(self.dataset.manifest["vocabulary"]["entries"]), sh["path"])
        starts = self.documents.column("start").to_numpy() if self.num_documents else np.zeros(0, np.int64)
        return TokenStream(chunks, doc_starts=starts)

    def batches(self, **kwargs: Any) -> BatchStream:
        """A :class:`seqpipe.windows.BatchStream` over this split (keyword arguments as there).

        Rows are padded with the vocabulary's padding token (``pad_id`` overrides it).
        """
        from seqpipe.windows import BatchStream

        if "pad_id" not in kwargs and kwargs.get("order") in ("documents", "evaluation"):
            kwargs["pad_id"] = self._padding_id()
        key = f"{self.dataset.fingerprint}:{self.name}"
        return BatchStream(self.stream, stream_key=key, **kwargs)

    def _padding_id(self) -> int:
        pad = self.dataset.vocabulary.id_of("padding")
        if pad is None:
            raise DatasetError(
                f"{self.dataset.directory}: the vocabulary has no padding token, which padded rows need; "
                "name one in [vocabulary] padding and rebuild, or pass pad_id"
            )
        return pad

    @property
    def text_bytes(self) -> int | None:
        """UTF-8 bytes of the split's cleaned text (from the manifest summary), or None if not recorded."""
        figures = self.dataset.manifest.get("summary", {}).get("splits", {}).get(self.name)
        per_token = figures.get("bytes_per_token") if isinstance(figures, dict) else None
        if isinstance(per_token, bool) or not isinstance(per_token, (int, float)):
            return None
        return round(per_token * self.num_tokens)

    def evaluation(
        self,
        batch_size: int,
        window: int,
        *,
        rank: int = 0,
        world_size: int = 1,
        stride: int | None = None,
        **kwargs: Any,
    ) -> Evaluation:
        """The exact evaluation pass over this split (see :class:`seqpipe.windows.Evaluation`)."""
        from seqpipe.evaluation import Evaluation

        stream = self.batches(
            batch_size=batch_size,
            window=window,
            order="evaluation",
            rank=rank,
            world_size=world_size,
            stride=stride,
            **kwargs,
        )
        return Evaluation(stream, targets=max(0, self.num_tokens - 1), text_bytes=self.text_bytes)


class Dataset:
    """A built dataset directory (see ``open_dataset``)."""

    def __init__(self, directory: Path, manifest: dict[str, Any]) -> None:
        self.directory = directory
        self.manifest = manifest
        self._splits: dict[str, Split] = {}

    @property
    def fingerprint(self) -> str:
        return str(self.manifest["fingerprint"])

    @property
    def splits(self) -> tuple[str, ...]:
        """Split names in pipeline order (train, validation, test), then any others."""
        from seqpipe.recipe import SPLIT_NAMES

        names = list(self.manifest["splits"])
        return tuple(sorted(names, key=lambda n: (SPLIT_NAMES.index(n) if n in SPLIT_NAMES else 99, n)))

    def split(self, name: str) -> Split:
        if name not in self.manifest["splits"]:
            raise DatasetError(f"{self.directory}: no split {name!r}; this dataset has {list(self.splits)}")
        if name not in self._splits:
            self._splits[name] = Split(self, name, self.manifest["splits"][name])
        return self._splits[name]

    @cached_property
    def vocabulary(self) -> Vocabulary:
        rel = self.manifest["vocabulary"]["path"]
        vocabulary = Vocabulary.load(safe_relative(self.directory, rel, key="vocabulary.path"))
        if len(vocabulary) != self.manifest["vocabulary"]["entries"]:
            raise ShardCorruptError(
                f"{rel}: holds {len(vocabulary)} entries, manifest says {self.manifest['vocabulary']['entries']}; "
                "run 'seqpipe verify' on the dataset, then rebuild it",
                path=rel,
            )
        return vocabulary

    @cached_property
    def encoder(self) -> Encoder:
        """The trained tokenizer, for encoding new text and decoding ids."""
        for i, f in enumerate(self.manifest["tokenizer"]["files"]):
            safe_relative(self.directory, f["path"], key=f"tokenizer.files[{i}].path")
        safe_relative(self.directory, self.manifest["vocabulary"]["path"], key="vocabulary.path")
        recipe = self.manifest["recipe"]
        try:
            tokenizer = parse_tokenizer(recipe.get("tokenizer", {}), "recipe.tokenizer")
            steps = tuple(parse_step(s, f"recipe.clean[{i}]") for i, s in enumerate(recipe.get("clean", [])))
        except Exception as exc:  # a manifest whose recipe this version cannot read
            raise ManifestError(
                f"{self.directory}: the manifest's tokenizer or clean section is not usable ({exc})"
            ) from exc
        encoder = tokenizer.load(self.directory)
        encoder.cleaning = steps
        return encoder


def open_dataset(directory: str | Path, *, verify: bool = False, copy_dir: str | Path | None = None) -> Dataset:
    """Open a built dataset. With ``verify`` every file is hashed first and any
    problem raises :class:`IntegrityError` before a single batch is read.

    ``directory`` may be a filesystem URI (a published dataset, see :mod:`seqpipe.transfer`):
    it is then copied to the local ``copy_dir`` (default: ``~/.cache/seqpipe/copies/KEY``),
    each file checked against the manifest's hash as it arrives and only missing or changed
    files fetched, and the copy is opened (memory-mapped like any local dataset).
    """
    from seqpipe.filesystem import is_uri

    if is_uri(directory):
        from seqpipe import transfer as remote

        where = remote.open_remote(str(directory), key="directory")
        directory = Path(copy_dir) if copy_dir is not None else remote.default_copy_dir(where)
        remote.fetch_remote(where, directory)
    elif copy_dir is not None:
        raise DatasetError(f"{directory}: copy_dir is only used to open a dataset behind a filesystem URI")
    d = Path(directory)
    if verify:
        from seqpipe._verify import verify as verify_dataset

        report = verify_dataset(d)
        if report.problems:
            raise IntegrityError(report.problems)
    return Dataset(d, read_manifest(d))


def load_encoder(directory: str | Path) -> Encoder:
    """The trained tokenizer of a built dataset: ``encode(text)`` (the dataset's cleaning applied
    first; ``encode(text, clean=False)`` skips it) / ``decode(ids)``."""
    return open_dataset(directory).encoder
