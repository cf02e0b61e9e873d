"""Byte-pair encoding tokenizer (Sennrich, Haddow & Birch, ACL 2016).

Text is first cut into *chunks* by a named chunking preset (``chunking``; the
default keeps words, digit groups and punctuation runs each with the spaces
after it, and line breaks alone; see ``_chunking`` for the presets and why);
the chunks of a document always concatenate back to the document. Merges are
learned over the distinct chunks of the train split (see ``_bpe_train``) and
applied inside each chunk, never across chunks.

Two bases:

* ``bytes``: the alphabet is all 256 byte values, so any text encodes and
  ``decode(encode(s)) == s`` exactly (NUL, emoji and combining marks included).
* ``chars``: the alphabet is the characters seen in training, in code-point
  order, plus the ``end_of_word`` marker if set (appended as the last symbol of
  every chunk). A character never seen in training encodes as the unknown id.
  Decoding drops a marker that ends a token, so text round-trips exactly
  unless it contains unseen characters or the marker string itself.

Policy for unencodable text: a string holding a lone surrogate (e.g.
``"\\ud800"``) has no UTF-8 form and raises :class:`TokenizerError`.

The learned state is stored as ``tokenizer.arrow``: one row per merge with
columns ``rank``, ``left``, ``right``, ``merged`` (ids) and ``token`` (bytes of
the merged id); schema metadata holds the tokenizer parameters as canonical
JSON. The vocabulary itself lives in ``vocab.arrow`` beside it.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any, ClassVar, Final

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import regex

from seqpipe import _patterns
from seqpipe._hashing import canonical_json
from seqpipe._parse import parse_bool, parse_int, parse_str, parse_str_tuple, to_plain
from seqpipe.errors import RecipeError, ShardCorruptError, TokenizerError
from seqpipe.shards import read_table, write_table
from seqpipe.tokenizers._bpe_train import (
    RankArrays,
    apply_merges,
    apply_merges_many,
    byte_symbols,
    char_symbols,
    learn,
    rank_table,
    read_counts,
)
from seqpipe.tokenizers._chunking import CHOICES, CUSTOM, DEFAULT, chunker, needs_time_limit, pattern_of
from seqpipe.tokenizers._common import segments_from_tokens, stored_vocabulary
from seqpipe.tokenizers._fast_chunking import chunk_batch
from seqpipe.tokenizers.base import Encoder, Segments, Tokenizer, expand
from seqpipe.vocab import VocabSpec, Vocabulary, reserved_table

DEFAULT_RESERVED: Final = VocabSpec().reserved
MERGES_FILE: Final = "tokenizer.arrow"
MERGES_FORMAT: Final = "seqpipe.merges/2"
MERGES_SCHEMA: Final = pa.schema(
    [("rank", pa.int32()), ("left", pa.int32()), ("right", pa.int32()), ("merged", pa.int32()), ("token", pa.binary())]
)
# Distinct chunks whose ids are remembered; a corpus's frequent chunks fit many
# times over, and a full cache is simply emptied (cheaper than per-entry aging).
CACHE_LIMIT: Final = 200_000
# A batch with more chunks than this missing from the cache merges them together with array
# operations (one round per merge step); fewer go one by one, where that costs less.
BATCH_MISSES: Final = 64
# The chunkings segmented with array operations (see _fast_chunking); the second digit-wise.
FAST_CHUNKINGS: Final = ("trailing-space", "trailing-space-digitwise")


@lru_cache(maxsize=16)
def _reserved_splitter(names: tuple[str, ...]) -> Any:
    # longest first, so a name that starts another name cannot shadow it
    alternatives = "|".join(regex.escape(n) for n in sorted(names, key=len, reverse=True))
    return regex.compile(f"({alternatives})")


def _surrogate_error(texts: Sequence[str]) -> TokenizerError:
    for d, text in enumerate(texts):
        try:
            text.encode("utf-8")
        except UnicodeEncodeError as exc:
            return TokenizerError(
                f"document {d}, character {exc.start}: {text[exc.start]!r} is a lone surrogate and has no "
                "UTF-8 form; repair the text (or decode the source with errors='replace') first",
                document=d,
                offset=exc.start,
            )
    return TokenizerError("text cannot be encoded as UTF-8")


def _check_chunk_regex(pattern: str) -> None:
    if not pattern:
        raise RecipeError("chunk_regex", "chunking = 'custom' needs a regular expression here; or name a preset")
    try:
        compiled = chunker(pattern)
    except (regex.error, ValueError, TypeError) as exc:
        raise RecipeError("chunk_regex", f"not a valid regular expression ({exc}): {pattern!r}") from exc
    if compiled.groups:
        # findall would return the groups instead of whole chunks
        raise RecipeError("chunk_regex", f"use non-capturing groups (?:...), got {pattern!r}")


def _chunks(cut: Any, splitter: Any, text: str, limit: float | None) -> list[str]:
    """``text`` cut into chunks (reserved names kept whole when ``splitter`` is given)."""
    if splitter is None:
        found: list[str] = cut.findall(text, timeout=limit)
        return found
    chunks: list[str] = []
    for j, part in enumerate(splitter.split(text)):
        if j % 2:
            chunks.append(part)  # a reserved name, kept whole
        elif part:
            chunks.extend(cut.findall(part, timeout=limit))
    return chunks


@dataclass(frozen=True, slots=True)
class BpeTokenizer(Tokenizer):
    """Recipe ``[tokenizer] kind = "bpe"``: byte-pair encoding over regex chunks.

    ``chunking`` names how text is cut into chunks (a preset of ``_chunking.PRESETS``, or
    ``"custom"`` with the regular expression in ``chunk_regex``).

    Training grows the vocabulary (reserved tokens, base alphabet and merges) up to
    ``[vocabulary] cap`` entries, one number for one concept; it also stops when no pair
    occurs at least ``min_pair_count`` times. A cap of 0 ("no cap") is refused: byte-pair
    training would otherwise merge until every chunk is one token.
    With ``literal_reserved``, the names in ``reserved_names`` (which must equal
    ``vocabulary.reserved``) are cut out of the text as their own chunks and encode
    as their reserved ids; otherwise they are ordinary text.
    """

    kind: ClassVar[str] = "bpe"
    grows_vocabulary: ClassVar[bool] = True

    base: str = "bytes"
    end_of_word: str = ""
    min_pair_count: int = 2
    chunking: str = DEFAULT
    chunk_regex: str = ""
    literal_reserved: bool = False
    reserved_names: tuple[str, ...] = DEFAULT_RESERVED

    def __post_init__(self) -> None:
        parse_str("base", self.base, choices=("bytes", "chars"))
        parse_str("end_of_word", self.end_of_word, allow_empty=True)
        if self.end_of_word and self.base != "chars":
            raise RecipeError(
                "end_of_word", f"only applies to base = 'chars', got {self.end_of_word!r} with base = {self.base!r}"
            )
        parse_int("min_pair_count", self.min_pair_count, minimum=1)
        parse_str("chunking", self.chunking, choices=CHOICES)
        parse_str("chunk_regex", self.chunk_regex, allow_empty=True)
        if self.chunking == CUSTOM:
            _check_chunk_regex(self.chunk_regex)
        elif self.chunk_regex:
            raise RecipeError(
                "chunk_regex", f"is only read with chunking = 'custom', but chunking = {self.chunking!r}; drop one"
            )
        parse_bool("literal_reserved", self.literal_reserved)
        names = parse_str_tuple("reserved_names", self.reserved_names)
        if len(set(names)) != len(names):
            raise RecipeError("reserved_names", f"names must be distinct, got {list(names)}")
        object.__setattr__(self, "reserved_names", names)

    @property
    def pattern(self) -> str:
        """The regular expression that cuts text into chunks."""
        return pattern_of(self.chunking, self.chunk_regex)

    # -- segmenting ------------------------------------------------------------
    def segment(self, texts: Sequence[str]) -> Segments:
        """Cut each document into chunks; keys are the distinct chunks' UTF-8 bytes."""
        fast = self._segment_fast(texts)
        if fast is not None:
            return fast
        if isinstance(texts, (pa.Array, pa.ChunkedArray)):
            texts = texts.to_pylist()
        cut = chunker(self.pattern)
        splitter = _reserved_splitter(self.reserved_names) if self.literal_reserved and self.reserved_names else None
        flat: list[str] = []
        lengths = np.empty(len(texts), dtype=np.int64)
        limit = _patterns.SECONDS_PER_DOCUMENT
        for d, text in enumerate(texts):
            try:
                chunks = _chunks(cut, splitter, text, limit if needs_time_limit(self.chunking, text) else None)
            except TimeoutError:
                raise _patterns.pattern_timeout("tokenizer bpe chunking", self.pattern, d, text) from None
            if not all(chunks):  # a pattern that can match empty text
                chunks = [c for c in chunks if c]
            lengths[d] = len(chunks)
            flat.extend(chunks)
        try:
            array = pa.array(flat, pa.large_string())
        except (UnicodeEncodeError, pa.ArrowException) as exc:
            raise _surrogate_error(texts) from exc
        return segments_from_tokens(array, lengths)

    def _segment_fast(self, texts: Sequence[str]) -> Segments | None:
        """:meth:`segment` for the ``trailing-space`` presets with array operations over the whole
        batch (same chunks); None where it does not apply (another chunking, literal reserved
        names, nulls, or text with no UTF-8 form, which the per-document path reports)."""
        if self.chunking not in FAST_CHUNKINGS or (self.literal_reserved and self.reserved_names):
            return None
        try:
            if isinstance(texts, pa.ChunkedArray):
                texts = texts.combine_chunks()
            array = texts.cast(pa.large_string()) if isinstance(texts, pa.Array) else pa.array(texts, pa.large_string())
        except (UnicodeEncodeError, pa.ArrowException):
            return None
        cut = chunk_batch(array, digitwise=self.chunking == FAST_CHUNKINGS[1])
        if cut is None:
            return None
        return segments_from_tokens(*cut)

    # -- training --------------------------------------------------------------
    def fit(self, counts: pa.Table, spec: VocabSpec, *, show: bool = False) -> BpeEncoder:
        """Learn merges from distinct-chunk counts (rows in corpus first-occurrence order).

        Each step merges the most frequent adjacent pair; among pairs of equal
        count, the one whose first occurrence is earliest in corpus order wins
        (chunk row, then position within the chunk). The result does not depend
        on ``PYTHONHASHSEED``. ``show``: a progress bar counting merges.
        """
        if self.literal_reserved and self.reserved_names != spec.reserved:
            raise RecipeError(
                "reserved_names",
                f"with literal_reserved these must equal vocabulary.reserved "
                f"{list(spec.reserved)}, got {list(self.reserved_names)}",
            )
        if not spec.cap:
            raise RecipeError(
                "vocabulary.cap",
                "byte-pair training grows the vocabulary up to [vocabulary] cap; set cap (e.g. cap = 8000)",
            )
        keys, freqs = read_counts(counts)
        if self.literal_reserved:
            reserved = pa.array([n.encode("utf-8") for n in self.reserved_names], keys.type)
            kept = pc.invert(pc.is_in(keys, value_set=reserved))
            keys, freqs = keys.filter(kept), freqs[kept.to_numpy(zero_copy_only=False)]
        reserved_tokens, roles = reserved_table(spec)
        n_reserved = len(reserved_tokens)
        if self.base == "bytes":
            alphabet, alpha_counts, flat, lengths = byte_symbols(keys, freqs, n_reserved)
        else:
            alphabet, alpha_counts, flat, lengths = char_symbols(keys, freqs, n_reserved, self.end_of_word)
        limit = spec.cap
        if limit < n_reserved + len(alphabet):
            need = n_reserved + len(alphabet)
            raise RecipeError(
                "vocabulary.cap",
                f"byte-pair training needs at least {need} ({n_reserved} reserved + {len(alphabet)} base symbols), "
                f"got {limit}",
            )
        tokens = [*reserved_tokens, *alphabet]
        learned = learn(flat, lengths, freqs, tokens, limit=limit, min_count=self.min_pair_count, show=show)
        vocabulary = Vocabulary(
            tokens=pa.array(learned.tokens, pa.binary()),
            counts=np.concatenate(
                [np.zeros(n_reserved, np.int64), alpha_counts, np.array(learned.merge_counts, np.int64)]
            ),
            n_reserved=n_reserved,
            roles=roles,
        )
        encoder = BpeEncoder(self, vocabulary, learned.merges, alphabet_size=len(alphabet))
        # training already segmented every train chunk: encoding them later is a table look-up
        encoder._known = Known(keys.cast(pa.binary()), learned.symbols, learned.offsets)
        return encoder

    # -- storage ---------------------------------------------------------------
    def load(self, directory: Path) -> BpeEncoder:
        """The encoder stored in ``directory`` (``vocab.arrow`` + ``tokenizer.arrow``), validated."""
        vocabulary = stored_vocabulary(directory)
        path = directory / MERGES_FILE
        table = read_table(path, full=True)

        def corrupt(why: str) -> ShardCorruptError:
            return ShardCorruptError(f"{path}: {why}; rebuild the dataset", path=str(path))

        meta = table.schema.metadata or {}
        if meta.get(b"seqpipe.table") != b"bpe-merges" or meta.get(b"seqpipe.format") != MERGES_FORMAT.encode():
            raise corrupt(f"not a seqpipe byte-pair merge table (format {MERGES_FORMAT})")
        try:
            stored = json.loads(meta[b"seqpipe.bpe"])
            alphabet_size = int(stored["alphabet_size"])
        except (KeyError, ValueError, TypeError) as exc:
            raise corrupt(f"unreadable tokenizer parameters ({exc})") from exc
        mine = self._params(alphabet_size, vocabulary.n_reserved)
        for key in sorted(set(mine) | set(stored)):
            if key != "reserved_names" and stored.get(key) != mine.get(key):
                raise corrupt(f"written with {key} = {stored.get(key)!r}, but the recipe says {mine.get(key)!r}")
        if not table.schema.equals(MERGES_SCHEMA, check_metadata=False):
            raise corrupt(
                f"expected schema {MERGES_SCHEMA.to_string(show_schema_metadata=False)!r}, "
                f"got {table.schema.to_string(show_schema_metadata=False)!r}"
            )
        if any(table.column(n).null_count for n in MERGES_SCHEMA.names):
            raise corrupt("merge table holds nulls")
        merges = _check_merges(table, vocabulary, alphabet_size, self, corrupt)
        tokenizer = self
        if self.literal_reserved:
            names = tuple(vocabulary.token(i).decode("utf-8", errors="replace") for i in range(vocabulary.n_reserved))
            tokenizer = dataclasses.replace(self, reserved_names=names)
        encoder = BpeEncoder(tokenizer, vocabulary, merges, alphabet_size=alphabet_size)
        encoder._known = _saved_known(directory, encoder)
        return encoder

    def _params(self, alphabet_size: int, n_reserved: int) -> dict[str, Any]:
        plain: dict[str, Any] = to_plain(self)
        return {**plain, "alphabet_size": alphabet_size, "n_reserved": n_reserved}


def _check_merges(
    table: pa.Table, vocabulary: Vocabulary, alphabet_size: int, tokenizer: BpeTokenizer, corrupt: Any
) -> list[tuple[int, int, int]]:
    """Merges of a stored table, each checked against the vocabulary beside it."""
    n_reserved = vocabulary.n_reserved
    tokens = [bytes(t) for t in vocabulary.tokens.to_pylist()]
    first_new = n_reserved + alphabet_size
    if len(tokens) < first_new:
        raise corrupt(f"vocabulary has {len(tokens)} tokens, fewer than reserved + alphabet ({first_new})")
    base = tokens[n_reserved:first_new]
    if tokenizer.base == "bytes":
        if base != [bytes([b]) for b in range(256)]:
            raise corrupt("vocabulary rows after the reserved tokens are not the 256 byte values in order")
    else:
        marker = tokenizer.end_of_word.encode("utf-8")
        chars = base[:-1] if marker else base
        if marker and (not base or base[-1] != marker):
            raise corrupt(f"base alphabet does not end with the marker {marker!r}")
        try:
            points = [ord(c.decode("utf-8")) for c in chars]
        except (UnicodeDecodeError, TypeError) as exc:
            raise corrupt("base alphabet entries are not single characters") from exc
        if any(a >= b for a, b in itertools.pairwise(points)):
            raise corrupt("base alphabet is not in ascending code-point order")
    ranks = table.column("rank").to_pylist()
    rows = zip(
        table.column("left").to_pylist(),
        table.column("right").to_pylist(),
        table.column("merged").to_pylist(),
        table.column("token").to_pylist(),
        strict=True,
    )
    if ranks != list(range(len(ranks))):
        raise corrupt("ranks are not 0, 1, 2, ... in row order")
    if first_new + len(ranks) != len(tokens):
        raise corrupt(
            f"{len(ranks)} merges after {first_new} base ids do not make the vocabulary's {len(tokens)} tokens"
        )
    merges: list[tuple[int, int, int]] = []
    for r, (a, b, z, tok) in enumerate(rows):
        # merge r makes id first_new + r out of ids that existed before it
        if z != first_new + r or not (n_reserved <= a < z and n_reserved <= b < z):
            raise corrupt(f"merge {r} ({a}, {b} -> {z}) does not join earlier ids into id {first_new + r}")
        if tok != tokens[a] + tokens[b] or tokens[z] != tok:
            raise corrupt(f"merge {r} does not match the vocabulary")
        merges.append((a, b, z))
    if len({(a, b) for a, b, _ in merges}) != len(merges):
        raise corrupt("a pair is merged twice")
    return merges


@dataclass(frozen=True, slots=True)
class Known:
    """Chunks whose ids are known in advance (the training chunks, segmented by training):
    chunk ``i`` of ``keys`` (binary) has ids ``symbols[offsets[i]:offsets[i + 1]]``."""

    keys: pa.Array
    symbols: np.ndarray
    offsets: np.ndarray

    def rows(self, keys: pa.Array) -> np.ndarray:
        """The row of each of ``keys`` (binary), -1 where it is not known."""
        found = pc.index_in(keys, value_set=self.keys)
        rows: np.ndarray = found.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
        return rows


# The training chunks of the encoder last saved, per directory (one entry): a build that fits and
# then encodes in one process loads the encoder back from disk, and with these it looks up the
# train split's chunks instead of merging each again. Used only when the loaded merges and
# vocabulary equal the saved ones, so a changed file can never be encoded with stale ids.
_SAVED: dict[str, tuple[BpeEncoder, Known]] = {}


def _saved_known(directory: Path, encoder: BpeEncoder) -> Known | None:
    entry = _SAVED.get(str(directory))
    if entry is None:
        return None
    saved, known = entry
    same = (
        saved.tokenizer == encoder.tokenizer
        and saved.alphabet_size == encoder.alphabet_size
        and saved.merges == encoder.merges
        and saved.vocabulary.n_reserved == encoder.vocabulary.n_reserved
        and saved.vocabulary.roles == encoder.vocabulary.roles
        and saved.vocabulary.tokens.equals(encoder.vocabulary.tokens)
    )
    return known if same else None


class BpeEncoder(Encoder):
    """A trained byte-pair encoding: merges by rank, applied per distinct chunk with a cache."""

    def __init__(
        self,
        tokenizer: BpeTokenizer,
        vocabulary: Vocabulary,
        merges: Sequence[tuple[int, int, int]],
        *,
        alphabet_size: int,
    ) -> None:
        self.tokenizer = tokenizer
        self.vocabulary = vocabulary
        self.merges = list(merges)
        self.alphabet_size = alphabet_size
        self._bpe = tokenizer
        self._ranks = rank_table(self.merges)
        self._rank_arrays = RankArrays.of(self.merges, len(vocabulary))
        self._cache: dict[bytes, tuple[int, ...]] = {}
        self._known: Known | None = None
        n_reserved = vocabulary.n_reserved
        tokens = [bytes(t) for t in vocabulary.tokens.to_pylist()]
        marker = tokenizer.end_of_word.encode("utf-8")
        self._char_id: dict[str, int] = {}
        self._tail: list[int] = []
        if tokenizer.base == "chars":
            n_chars = alphabet_size - bool(marker)
            self._char_id = {tokens[i].decode("utf-8"): i for i in range(n_reserved, n_reserved + n_chars)}
            self._char_points = np.array([ord(c) for c in self._char_id], dtype=np.int64)  # code-point order
            self._tail = [n_reserved + n_chars] if marker else []
        else:
            self._char_points = np.empty(0, dtype=np.int64)
        self._reserved_id = {tokens[i]: i for i in range(n_reserved)} if tokenizer.literal_reserved else {}
        # decode table: the bytes each id prints as (a token-final marker prints as nothing)
        shown = [
            t[: -len(marker)] if marker and i >= n_reserved and t.endswith(marker) else t for i, t in enumerate(tokens)
        ]
        self._shown = np.frombuffer(b"".join(shown), dtype=np.uint8).astype(np.int64)
        self._shown_offsets = np.concatenate([[0], np.cumsum([len(t) for t in shown])]).astype(np.int64)

    def _symbols(self, key: bytes) -> list[int]:
        if self._bpe.base == "bytes":
            n_reserved = self.vocabulary.n_reserved
            return [n_reserved + b for b in key]
        unknown = self.vocabulary.unknown_id
        out: list[int] = []
        for ch in key.decode("utf-8"):
            sid = self._char_id.get(ch, unknown)
            if sid is None:
                raise TokenizerError(
                    f"character {ch!r} was not seen in training and the recipe sets no unknown token "
                    "(vocabulary.unknown)"
                )
            out.append(sid)
        return out + self._tail

    def chunk_ids(self, key: bytes) -> tuple[int, ...]:
        """Ids of one chunk (cached)."""
        ids = self._cache.get(key)
        if ids is None:
            reserved = self._reserved_id.get(key)
            ids = (reserved,) if reserved is not None else tuple(apply_merges(self._symbols(key), self._ranks))
            if len(self._cache) >= CACHE_LIMIT:
                self._cache.clear()
            self._cache[key] = ids
        return ids

    def _many_symbols(self, keys: list[bytes]) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`_symbols` of many chunks: flat ids and each chunk's length."""
        n_reserved = self.vocabulary.n_reserved
        if self._bpe.base == "bytes":
            lengths = np.fromiter(map(len, keys), dtype=np.int64, count=len(keys))
            return np.frombuffer(b"".join(keys), dtype=np.uint8).astype(np.int64) + n_reserved, lengths
        texts = [k.decode("utf-8") for k in keys]
        lengths = np.fromiter(map(len, texts), dtype=np.int64, count=len(texts))
        points = np.frombuffer("".join(texts).encode("utf-32-le"), dtype="<u4").astype(np.int64)
        at = np.minimum(np.searchsorted(self._char_points, points), max(len(self._char_points) - 1, 0))
        seen = self._char_points[at] == points if len(self._char_points) else np.zeros(len(points), dtype=bool)
        flat = at + n_reserved
        if not seen.all():
            unknown = self.vocabulary.unknown_id
            if unknown is None:
                self._symbols(chr(int(points[~seen][0])).encode("utf-8"))  # raises the error it gives
            flat[~seen] = unknown
        if self._tail:
            flat = np.insert(flat, np.cumsum(lengths), self._tail[0])
            lengths = lengths + 1
        return flat, lengths

    def _fill(self, keys: list[bytes]) -> dict[bytes, tuple[int, ...]]:
        """Ids of the chunks among ``keys`` missing from the cache when there are many (merged
        together); the cache takes them while it has room."""
        cache, reserved = self._cache, self._reserved_id
        missing = [k for k in keys if k not in cache and k not in reserved]
        if len(missing) <= BATCH_MISSES:
            return {}
        flat, lengths = apply_merges_many(*self._many_symbols(missing), self._rank_arrays)
        values = flat.tolist()
        ends = itertools.accumulate(lengths.tolist())
        fresh = {k: tuple(values[e - n : e]) for k, e, n in zip(missing, ends, lengths.tolist(), strict=True)}
        if len(cache) + len(fresh) > CACHE_LIMIT:
            cache.clear()
        if len(fresh) <= CACHE_LIMIT:
            cache.update(fresh)
        return fresh

    def forget(self) -> None:
        """Drop every chunk whose ids are remembered (the cache and the training chunks), so that
        each chunk is merged afresh, as by an encoder loaded in a new process."""
        self._cache.clear()
        self._known = None

    def piece_ids(self, keys: pa.Array) -> tuple[np.ndarray, np.ndarray]:
        chunks = keys.cast(pa.binary())
        rows = self._known.rows(chunks) if self._known is not None else np.full(len(chunks), -1, np.int64)
        hit = rows >= 0
        missing: list[bytes] = chunks.filter(pa.array(~hit)).to_pylist() if not hit.all() else []
        fresh = self._fill(missing)
        runs = [fresh.get(k) or self.chunk_ids(k) for k in missing]
        lengths = np.empty(len(chunks), dtype=np.int64)
        if self._known is not None:
            lengths[hit] = np.diff(self._known.offsets)[rows[hit]]
        lengths[~hit] = np.fromiter(map(len, runs), dtype=np.int64, count=len(runs))
        offsets = np.zeros(len(chunks) + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        values = np.empty(int(offsets[-1]), dtype=np.int64)
        from_known = np.repeat(hit, lengths)
        if self._known is not None and hit.any():
            found = rows[hit]
            values[from_known], _ = expand(
                self._known.symbols, self._known.offsets, found, np.array([len(found)], np.int64)
            )
        values[~from_known] = np.fromiter(
            itertools.chain.from_iterable(runs), dtype=np.int64, count=len(values) - int(from_known.sum())
        )
        return values, offsets

    def decode(self, ids: Sequence[int] | np.ndarray, *, show_reserved: bool = False) -> str:
        """Text of ``ids``: token bytes joined and read as UTF-8 (invalid sequences, possible
        only for id runs no text encodes to, become U+FFFD). Specials print as their names
        when ``show_reserved``, else nothing."""
        arr = np.asarray(ids, dtype=np.int64).ravel()
        size = len(self.vocabulary)
        if len(arr) and (arr.min() < 0 or arr.max() >= size):
            bad = int(arr[(arr < 0) | (arr >= size)][0])
            raise TokenizerError(f"id {bad} is outside the vocabulary (0..{size - 1})")
        if not show_reserved:
            arr = arr[arr >= self.vocabulary.n_reserved]
        if not len(arr):
            return ""
        flat, _ = expand(self._shown, self._shown_offsets, arr, np.array([len(arr)], dtype=np.int64))
        return flat.astype(np.uint8).tobytes().decode("utf-8", errors="replace")

    def save(self, directory: Path) -> list[str]:
        """Write ``tokenizer.arrow`` (merges + parameters) into ``directory``."""
        tokens = self.vocabulary.tokens
        left, right, merged = ([m[k] for m in self.merges] for k in range(3))
        table = pa.table(
            {
                "rank": pa.array(range(len(self.merges)), pa.int32()),
                "left": pa.array(left, pa.int32()),
                "right": pa.array(right, pa.int32()),
                "merged": pa.array(merged, pa.int32()),
                "token": tokens.take(pa.array(merged, pa.int64())).cast(pa.binary()),
            },
            schema=MERGES_SCHEMA,
        )
        params = self._bpe._params(self.alphabet_size, self.vocabulary.n_reserved)
        table = table.replace_schema_metadata(
            {
                b"seqpipe.table": b"bpe-merges",
                b"seqpipe.format": MERGES_FORMAT.encode(),
                b"seqpipe.bpe": canonical_json(params).encode("ascii"),
            }
        )
        write_table(directory / MERGES_FILE, table)
        _SAVED.clear()
        if self._known is not None:
            _SAVED[str(directory)] = (self, self._known)
        return [MERGES_FILE]
