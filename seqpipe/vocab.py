"""Vocabulary: reserved tokens first, then tokens by count.

Counted on the train split only. Order: the reserved tokens in recipe order take
ids 0..k-1; then tokens by descending count, ties broken by code-point order of
the token (for UTF-8 keys, byte order equals code-point order). ``min_count``
drops rare tokens; ``cap`` caps the whole vocabulary, reserved tokens included.

The default reserved order puts the padding token first (id 0): an array filled
with zeros, or a zero-initialised buffer, is then all padding, never a real token.

Stored as an Arrow IPC file with columns ``token`` (binary), ``count``
(int64), ``reserved`` (bool); row i is id i. Schema metadata records the roles.
A build rewrites ``count`` once the shards exist: the occurrences of each id in the
train split's shards (seqpipe._build.count_train_ids), one definition for every kind.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from seqpipe._parse import parse_int, parse_str, parse_str_tuple
from seqpipe.errors import RecipeError, ShardCorruptError, TokenizerError

ROLES: Final = ("unknown", "padding", "begin", "end")
VOCAB_FORMAT: Final = "seqpipe.vocabulary/2"
# Ids are stored as at most uint32 (the README's on-disk layout), so no vocabulary is larger.
MAX_ENTRIES: Final = 1 << 32
COUNTS_SCHEMA: Final = pa.schema([("key", pa.binary()), ("count", pa.int64())])


@dataclass(frozen=True, slots=True)
class VocabSpec:
    """Recipe section ``[vocabulary]``."""

    reserved: tuple[str, ...] = ("<pad>", "<unk>", "<bos>", "<eos>")
    unknown: str = "<unk>"
    padding: str = "<pad>"
    begin: str = "<bos>"
    end: str = "<eos>"
    min_count: int = 1
    cap: int = 0  # 0: no cap
    # a dataset (path relative to the recipe, or a URI) whose vocabulary and tokenizer state this
    # build copies instead of fitting its own ("": fit one); see seqpipe/_reuse.py
    reuse_from: str = ""

    def __post_init__(self) -> None:
        reserved = parse_str_tuple("reserved", self.reserved)
        if len(set(reserved)) != len(reserved):
            raise RecipeError("reserved", f"names must be distinct, got {list(reserved)}")
        object.__setattr__(self, "reserved", reserved)
        for role in ROLES:
            name = parse_str(role, getattr(self, role), allow_empty=True)
            if name and name not in reserved:
                raise RecipeError(
                    role,
                    f"{name!r} is not listed in reserved {list(reserved)}; "
                    'add it there or set this role to "" for none',
                )
        parse_int("min_count", self.min_count, minimum=1)
        parse_int("cap", self.cap, minimum=0, maximum=MAX_ENTRIES)
        parse_str("reuse_from", self.reuse_from, allow_empty=True)
        if self.cap and self.cap <= len(reserved):
            raise RecipeError("cap", f"expected more than the {len(reserved)} reserved tokens, got {self.cap}")


@dataclass(frozen=True)
class Vocabulary:
    """id -> token bytes, with counts and reserved-token roles."""

    tokens: pa.Array  # binary, row i = id i
    counts: np.ndarray  # int64
    n_reserved: int
    roles: dict[str, int] = field(default_factory=dict)  # role -> id

    def __len__(self) -> int:
        return len(self.tokens)

    @property
    def unknown_id(self) -> int | None:
        return self.roles.get("unknown")

    def id_of(self, role: str) -> int | None:
        """Id of a reserved role (``unknown``, ``padding``, ``begin``, ``end``), or None."""
        return self.roles.get(role)

    def token(self, token_id: int) -> bytes:
        return bytes(self.tokens[int(token_id)].as_py())

    def lookup(self, keys: pa.Array) -> np.ndarray:
        """Ids of non-reserved tokens ``keys`` (binary); misses get the unknown id."""
        normal = self.tokens.slice(self.n_reserved)
        pos = pc.index_in(keys.cast(pa.binary()), value_set=normal)
        ids = pos.to_numpy(zero_copy_only=False)
        missing = pos.is_null().to_numpy(zero_copy_only=False)
        out = np.where(missing, -1, np.nan_to_num(ids, nan=-1)).astype(np.int64)
        out[~missing] += self.n_reserved
        if missing.any():
            unk = self.unknown_id
            if unk is None:
                first = keys[int(np.flatnonzero(missing)[0])].as_py()
                raise TokenizerError(
                    f"token {first!r} is not in the vocabulary and the recipe sets no unknown token "
                    "(vocabulary.unknown)"
                )
            out[missing] = unk
        return out

    def tokens_for(self, ids: Iterable[int] | np.ndarray, *, show_reserved: bool = False) -> list[bytes]:
        """Token bytes for ids; reserved tokens are dropped unless ``show_reserved``."""
        arr = np.asarray(list(ids) if not isinstance(ids, np.ndarray) else ids, dtype=np.int64)
        if len(arr) and (arr.min() < 0 or arr.max() >= len(self)):
            bad = int(arr[(arr < 0) | (arr >= len(self))][0])
            raise TokenizerError(f"id {bad} is outside the vocabulary (0..{len(self) - 1})")
        if not show_reserved:
            arr = arr[arr >= self.n_reserved]
        return [bytes(b) for b in self.tokens.take(pa.array(arr, pa.int64())).to_pylist()]

    # -- storage -------------------------------------------------------------
    def to_table(self) -> pa.Table:
        reserved = np.zeros(len(self), dtype=bool)
        reserved[: self.n_reserved] = True
        meta = {
            b"seqpipe.table": b"vocabulary",
            b"seqpipe.format": VOCAB_FORMAT.encode(),
            b"seqpipe.roles": json.dumps(self.roles, sort_keys=True).encode(),
        }
        return pa.table(
            {
                "token": self.tokens.cast(pa.binary()),
                "count": pa.array(self.counts, pa.int64()),
                "reserved": pa.array(reserved),
            }
        ).replace_schema_metadata(meta)

    def save(self, path: Path) -> None:
        from seqpipe.shards import write_table

        write_table(path, self.to_table())

    @classmethod
    def load(cls, path: Path) -> Vocabulary:
        from seqpipe.shards import read_table

        table = read_table(path, full=True)
        meta = table.schema.metadata or {}
        if meta.get(b"seqpipe.table") != b"vocabulary" or meta.get(b"seqpipe.format") != VOCAB_FORMAT.encode():
            raise ShardCorruptError(f"{path}: not a seqpipe vocabulary file (format {VOCAB_FORMAT})", path=str(path))
        try:
            expected = {"token": pa.binary(), "count": pa.int64(), "reserved": pa.bool_()}
            if {f.name: f.type for f in table.schema} != expected or any(c.null_count for c in table.columns):
                raise ValueError("expected columns token (binary), count (int64), reserved (bool), no nulls")
            roles = {str(k): int(v) for k, v in json.loads(meta[b"seqpipe.roles"]).items()}
            reserved = table.column("reserved").to_numpy(zero_copy_only=False)
            tokens = table.column("token").combine_chunks()
            counts = table.column("count").to_numpy().astype(np.int64)
        except (KeyError, ValueError, TypeError, UnicodeDecodeError, AttributeError, pa.ArrowException) as exc:
            raise ShardCorruptError(f"{path}: malformed vocabulary file ({exc})", path=str(path)) from exc
        n_reserved = int(reserved.sum())
        if not reserved[:n_reserved].all() or any(not 0 <= v < n_reserved for v in roles.values()):
            raise ShardCorruptError(f"{path}: malformed vocabulary file (reserved rows)", path=str(path))
        return cls(tokens=tokens, counts=counts, n_reserved=n_reserved, roles=roles)


def ordered_counts(counts: pa.Table) -> pa.Table:
    """Counts sorted by descending count, ties by ascending key bytes."""
    if counts.num_rows == 0:
        return counts
    return counts.sort_by([("count", "descending"), ("key", "ascending")])


def reserved_table(spec: VocabSpec) -> tuple[list[bytes], dict[str, int]]:
    """The reserved tokens (as bytes, in id order) and their role -> id map."""
    tokens = [s.encode("utf-8") for s in spec.reserved]
    roles = {r: spec.reserved.index(getattr(spec, r)) for r in ROLES if getattr(spec, r)}
    return tokens, roles


def build_vocabulary(counts: pa.Table, spec: VocabSpec, *, always: Sequence[bytes] = ()) -> Vocabulary:
    """Fix the vocabulary from corpus-wide counts (see module docstring).

    ``always`` lists tokens that are kept whatever their count (e.g. all 256 bytes).
    """
    reserved_tokens, roles = reserved_table(spec)
    ordered = ordered_counts(counts)
    keys = ordered.column("key").combine_chunks() if ordered.num_rows else pa.array([], pa.binary())
    cnt = ordered.column("count").to_numpy() if ordered.num_rows else np.zeros(0, np.int64)
    # a key equal to a reserved name is still an ordinary token of the text; keep both
    keep = cnt >= spec.min_count
    keys, cnt = keys.filter(pa.array(keep)), cnt[keep]
    if always:
        have = set(keys.to_pylist())
        extra = [a for a in always if a not in have]
        if extra:
            keys = pa.concat_arrays([keys, pa.array(extra, pa.binary())])
            cnt = np.concatenate([cnt, np.zeros(len(extra), np.int64)])
    if spec.cap:
        room = spec.cap - len(reserved_tokens)
        keys, cnt = keys.slice(0, room), cnt[:room]
    tokens = pa.concat_arrays([pa.array(reserved_tokens, pa.binary()), keys.cast(pa.binary())])
    counts_all = np.concatenate([np.zeros(len(reserved_tokens), np.int64), cnt]).astype(np.int64)
    return Vocabulary(tokens=tokens, counts=counts_all, n_reserved=len(reserved_tokens), roles=roles)
