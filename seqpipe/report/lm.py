"""Baseline n-gram language models fitted on train, and their perplexities.

Each document is one sentence. The *events* of a document with content
``w_1..w_m`` are the predictions of ``w_1, ..., w_m`` and, when the document ends
with the end marker (as the build wrote it), of that end token after ``w_m``; the context of each event is the
preceding tokens of the document, padded on the left with the begin id (with a
virtual begin id when the vocabulary has none). Begin tokens are never predicted.

The event space is every vocabulary id except the padding id: the ids a stream can
hold. Its size ``V`` is the uniform model's perplexity and the add-k denominator.

Models (``c`` = train counts of events and their contexts, ``N1+`` = number of
distinct types, ``d`` = discount):

* uniform: ``1/V``; unigram / bigram / trigram add-k: ``(c(h,w) + k) / (c(h) + kV)``;
* interpolated Kneser-Ney (bigram, trigram), in the form of Chen & Goodman
  (from memory): the top order discounts raw counts, lower orders discount
  continuation counts, ``P(w|h) = max(c(h,w)-d, 0)/c(h) + d N1+(h.)/c(h) P(w|h')``,
  and an unseen context backs off to the lower order with weight 1. The unigram
  level is the continuation distribution ``N1+(.w)/N1+(..)``, itself discounted and
  interpolated with the uniform ``1/V`` so that no event gets probability 0
  (``floor=False`` drops that last step, which is how ``nltk.lm`` defines it).

Perplexity is ``exp`` of the mean negative log-likelihood per event. Every lookup
is a ``np.searchsorted`` into sorted packed keys.

Memory: a split is processed in groups of whole documents of about ``CHUNK_TOKENS`` tokens
(:func:`chunks`). Fitting never holds a table of all train trigrams: each group's distinct
trigrams are spilled to disk in hash partitions, and the partitions yield the counts at the
validation/test keys only (:meth:`CountTables.fit_spilled`). Evaluation sums log-probabilities
over slices of ``EVAL_EVENTS`` events, so its per-event arrays (contexts, packed keys, looked-up
counts, probabilities: some 150 bytes per event) exist for one slice at a time.
"""

from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import numpy as np

from seqpipe.report import corpus
from seqpipe.report.corpus import Roles, SplitTokens
from seqpipe.report.ngrams import filler, lookup, merge_counts, pack, positions, runs, take
from seqpipe.report.spill import Spill, by_partition


@dataclass(frozen=True, slots=True)
class Events:
    """Predicted tokens ``w`` with their two preceding context ids ``h1`` (nearest), ``h2``."""

    h2: np.ndarray
    h1: np.ndarray
    w: np.ndarray

    def __len__(self) -> int:
        return len(self.w)


CHUNK_TOKENS: Final = corpus.CHUNK_TOKENS  # tokens per group of documents: bounds the per-event temporaries
EVAL_EVENTS: Final = 1 << 18  # events per evaluation slice


def chunks(split: SplitTokens, size: int = CHUNK_TOKENS) -> Iterator[SplitTokens]:
    """The split's documents in consecutive groups of about ``size`` tokens, a document never cut;
    each group's ``ids`` is a view of the split's stream from its first document's start."""
    n = split.num_documents
    if n == 0:
        yield split
        return
    ends = split.starts + split.lengths
    # the first document of each group: where the running token count passes a multiple of size
    cuts = np.unique(np.searchsorted(ends - split.starts[0], np.arange(size, int(ends[-1] - split.starts[0]), size)))
    bounds = [0, *(int(c) + 1 for c in cuts if int(c) + 1 < n), n]
    for a, b in itertools.pairwise(bounds):
        if a == b:
            continue
        lo, hi = int(split.starts[a]), int(ends[b - 1])
        yield dataclasses.replace(
            split,
            ids=split.ids[lo:hi],
            starts=split.starts[a:b] - lo,
            lengths=split.lengths[a:b],
            content_starts=split.content_starts[a:b] - lo,
            content_lengths=split.content_lengths[a:b],
            has_end=split.has_end[a:b],
        )


def event_space(roles: Roles) -> int:
    """Size of the event space: the vocabulary without the padding id."""
    return roles.vocab_size - (1 if roles.padding is not None else 0)


def begin_context(roles: Roles) -> int:
    """Id that pads contexts on the left: the begin id, or the virtual id ``V``."""
    return roles.begin if roles.begin is not None else roles.vocab_size


def events(split: SplitTokens, roles: Roles) -> Events:
    """The split's events (see the module docstring), built without a per-token loop."""
    m = split.content_lengths
    pad = 2
    seg = pad + m + split.has_end
    offsets = np.cumsum(seg) - seg
    # one row per document: two begin slots, the content, the end token if the document has one
    seq = np.full(int(seg.sum()), begin_context(roles), dtype=np.int64)
    is_content = np.ones(len(seq), dtype=bool)
    is_content[offsets] = False
    is_content[offsets + 1] = False
    ends = (offsets + pad + m)[split.has_end]
    is_content[ends] = False
    seq[is_content] = split.content_ids()  # documents are in stream order, so a boolean fill suffices
    target = is_content
    if roles.end is not None:
        seq[ends] = roles.end
        target[ends] = True
    # target[0] and target[1] are pad slots, so the shifted masks line up with seq[target]
    return Events(h2=seq[:-2][target[2:]], h1=seq[:-1][target[1:]], w=seq[target])


@dataclass(frozen=True, slots=True)
class CountTables:
    """Sorted packed keys of the train events' n-grams and the counts the models need (from
    :meth:`fit_spilled`: only at the keys evaluation looks up, every key's figure exact)."""

    bits: int
    n_events: int
    tri_keys: np.ndarray  # (h2, h1, w) types
    tri_counts: np.ndarray
    ctx_keys: np.ndarray  # (h2, h1) contexts
    ctx_counts: np.ndarray  # c(h2 h1)
    ctx_types: np.ndarray  # N1+(h2 h1 .)
    bi_keys: np.ndarray  # (h1, w) types
    bi_counts: np.ndarray  # c(h1 w)
    bi_left: np.ndarray  # N1+(. h1 w): distinct h2 before (h1, w)
    h1_keys: np.ndarray  # h1 contexts
    h1_counts: np.ndarray  # c(h1)
    h1_types: np.ndarray  # N1+(h1 .)
    h1_left: np.ndarray  # N1+(. h1 .)
    uni_counts: np.ndarray  # c(w), indexed by id
    uni_left: np.ndarray  # N1+(. w), indexed by id
    bigram_types: int  # N1+(. .)

    @classmethod
    def fit(cls, ev: Events, bits: int, n_ids: int) -> CountTables:
        """The tables of one array of events."""
        return cls.fit_chunks([ev], bits, n_ids)

    @classmethod
    def fit_chunks(cls, parts: Iterable[Events], bits: int, n_ids: int) -> CountTables:
        """The tables of the events of every part, keeping only distinct trigrams between parts."""
        tri = np.zeros(0, np.uint64)
        tri_c = np.zeros(0, np.int64)
        for ev in parts:
            keys = pack([ev.h2, ev.h1, ev.w], bits)
            keys.sort()
            new, new_c, _ = runs(keys)
            tri, tri_c = _merge_counts(tri, tri_c, new, new_c)
        return cls._from_trigrams(tri, tri_c, bits, n_ids)

    @classmethod
    def fit_spilled(
        cls, parts: Iterable[Events], queries: np.ndarray, bits: int, n_ids: int, *, workdir: Path, partitions: int
    ) -> CountTables:
        """Tables that equal :meth:`fit_chunks`'s at every trigram key of ``queries`` (sorted, distinct:
        see :func:`query_keys`), at their contexts and suffixes, and at every id; other keys are absent.

        No table of every train trigram is held: each part's distinct trigrams are spilled to
        ``partitions`` files under ``workdir`` by context ``(h2, h1)``; each file, counted on its own,
        gives the trigram and context figures and spills its distinct trigrams again by suffix
        ``(h1, w)``, whose files give the bigram, ``h1`` and unigram figures (see :mod:`seqpipe.report.spill`)."""
        by_ctx = Spill(workdir, "lm-context", partitions)
        for ev in parts:
            keys = pack([ev.h2, ev.h1, ev.w], bits)
            keys.sort()
            new, new_c, _ = runs(keys)
            del keys
            by_ctx.add(new, new_c, new >> np.uint64(bits))
        by_bi = Spill(workdir, "lm-suffix", partitions)
        n_events, tri_counts, ctx_keys, ctx_counts, ctx_types = _context_pass(by_ctx, by_bi, queries, bits)
        for part in range(partitions):
            by_ctx.path(part).unlink(missing_ok=True)
        b = _bigram_pass(by_bi, queries, bits, n_ids)
        return cls(
            bits=bits,
            n_events=n_events,
            tri_keys=queries,
            tri_counts=tri_counts,
            ctx_keys=ctx_keys,
            ctx_counts=ctx_counts,
            ctx_types=ctx_types,
            bi_keys=b["bi_keys"],
            bi_counts=b["bi_counts"],
            bi_left=b["bi_left"],
            h1_keys=np.arange(n_ids, dtype=np.uint64),  # every id: the h1 figures are indexed by id
            h1_counts=b["h1_counts"],
            h1_types=b["h1_types"],
            h1_left=b["h1_left"],
            uni_counts=b["uni_counts"],
            uni_left=b["uni_left"],
            bigram_types=b["bigram_types"],
        )

    @classmethod
    def _from_trigrams(cls, tri: np.ndarray, tri_c: np.ndarray, bits: int, n_ids: int) -> CountTables:
        """Count everything from the sorted distinct trigram keys and one sort of their suffixes."""
        shift = np.uint64(bits)
        ctx, ctx_types, ctx_starts = runs(tri >> shift)
        ctx_c = np.add.reduceat(tri_c, ctx_starts) if len(tri) else tri_c
        del ctx_starts
        # trigram-sized temporaries are dropped as soon as used: they set the report's peak memory
        order = np.argsort(tri & np.uint64(filler(2 * bits)))
        suffix = tri[order]
        np.bitwise_and(suffix, np.uint64(filler(2 * bits)), out=suffix)
        bi, bi_left, bi_starts = runs(suffix)  # bi_left: trigram types per (h1, w)
        del suffix
        bi_c = np.add.reduceat(tri_c[order], bi_starts) if len(bi) else tri_c
        del order, bi_starts
        h1, h1_types, h1_starts = runs(bi >> shift)
        h1_c = np.add.reduceat(bi_c, h1_starts) if len(bi) else bi_c
        h1_left = np.add.reduceat(bi_left, h1_starts) if len(bi) else bi_left
        w_of_bi = (bi & np.uint64(filler(bits))).view(np.int64)
        return cls(
            bits=bits,
            n_events=int(tri_c.sum()),
            tri_keys=tri,
            tri_counts=tri_c,
            ctx_keys=ctx,
            ctx_counts=ctx_c,
            ctx_types=ctx_types,
            bi_keys=bi,
            bi_counts=bi_c,
            bi_left=bi_left,
            h1_keys=h1,
            h1_counts=h1_c,
            h1_types=h1_types,
            h1_left=h1_left,
            # every event has one (h1, w): c(w) sums the bigram counts of w (exact: integer weights below 2**53)
            uni_counts=np.bincount(w_of_bi, weights=bi_c, minlength=n_ids).astype(np.int64),
            uni_left=np.bincount(w_of_bi, minlength=n_ids).astype(np.int64),
            bigram_types=len(bi),
        )


@dataclass(frozen=True, slots=True)
class _Queries:
    """Sorted distinct keys looked up partition by partition: their indexes ordered by the
    partition of their group key, and each partition's slice of that order."""

    keys: np.ndarray
    order: np.ndarray
    edges: np.ndarray

    @classmethod
    def of(cls, keys: np.ndarray, group: np.ndarray, partitions: int) -> _Queries:
        order, edges = by_partition(group, partitions)
        return cls(keys=keys, order=order, edges=edges)

    def gather(self, part: int, table_keys: np.ndarray, tables: list[np.ndarray], out: list[np.ndarray]) -> None:
        """``out[i][j] = tables[i]`` at query ``j``'s key, for the queries of partition ``part``
        (0 where ``table_keys`` lacks it); each query is in one partition, so this sets it once."""
        idx = self.order[self.edges[part] : self.edges[part + 1]]
        pos = positions(table_keys, self.keys[idx])
        for table, dest in zip(tables, out, strict=True):
            dest[idx] = take(table, pos)


def query_keys(parts: Iterable[Events], bits: int) -> np.ndarray:
    """Sorted distinct trigram keys of the events of every part: the keys evaluation looks up."""
    out = np.zeros(0, np.uint64)
    for ev in parts:
        keys = pack([ev.h2, ev.h1, ev.w], bits)
        keys.sort()
        joined = np.concatenate([out, runs(keys)[0]])
        joined.sort(kind="stable")  # two sorted runs: a merge
        out = runs(joined)[0]
    return out


def _context_pass(
    by_ctx: Spill, by_bi: Spill, queries: np.ndarray, bits: int
) -> tuple[int, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """From train trigrams spilled by context ``(h2, h1)``: the number of events, the trigram counts at
    ``queries``, the queries' contexts with ``c(h2 h1)`` and ``N1+(h2 h1 .)``; spills each distinct
    trigram's suffix ``(h1, w)`` with the trigram's count into ``by_bi`` (one row per trigram)."""
    shift = np.uint64(bits)
    pair = np.uint64(filler(2 * bits))
    ctx_keys = runs(queries >> shift)[0]
    tri_q = _Queries.of(queries, queries >> shift, by_ctx.parts)
    ctx_q = _Queries.of(ctx_keys, ctx_keys, by_ctx.parts)
    tri_counts = np.zeros(len(queries), np.int64)
    ctx_counts, ctx_types = np.zeros(len(ctx_keys), np.int64), np.zeros(len(ctx_keys), np.int64)
    n_events = 0
    for part in range(by_ctx.parts):
        tri, tri_c, _ = by_ctx.totals(part)
        n_events += int(tri_c.sum())
        suffix = tri & pair
        by_bi.add(suffix, tri_c, suffix)  # one row per distinct trigram, keyed by its suffix
        del suffix
        tri_q.gather(part, tri, [tri_c], [tri_counts])
        ctx, types, starts = runs(tri >> shift)
        ctx_c = np.add.reduceat(tri_c, starts) if len(ctx) else tri_c
        ctx_q.gather(part, ctx, [ctx_c, types], [ctx_counts, ctx_types])
    return n_events, tri_counts, ctx_keys, ctx_counts, ctx_types


def _bigram_pass(by_bi: Spill, queries: np.ndarray, bits: int, n_ids: int) -> dict[str, Any]:
    """From distinct train trigrams spilled by suffix ``(h1, w)``: the bigram figures at the queries'
    suffixes, and the per-id figures (arrays indexed by id) of ``h1`` contexts and unigrams."""
    shift = np.uint64(bits)
    bi_keys = np.unique(queries & np.uint64(filler(2 * bits)))
    bi_q = _Queries.of(bi_keys, bi_keys, by_bi.parts)
    out: dict[str, Any] = {"bi_keys": bi_keys, "bi_counts": np.zeros(len(bi_keys), np.int64)}
    out["bi_left"] = np.zeros(len(bi_keys), np.int64)
    for name in ("h1_counts", "h1_types", "h1_left", "uni_counts", "uni_left"):
        out[name] = np.zeros(n_ids, np.int64)
    out["bigram_types"] = 0
    for part in range(by_bi.parts):
        # rows are distinct trigrams, so the rows of one bigram number its distinct h2: N1+(. h1 w)
        bi, bi_c, bi_left = by_bi.totals(part)
        bi_q.gather(part, bi, [bi_c, bi_left], [out["bi_counts"], out["bi_left"]])
        h1 = (bi >> shift).view(np.int64)
        w = (bi & np.uint64(filler(bits))).view(np.int64)
        # float weights are exact for integer sums below 2**53
        out["h1_counts"] += np.bincount(h1, weights=bi_c, minlength=n_ids).astype(np.int64)
        out["h1_types"] += np.bincount(h1, minlength=n_ids)
        out["h1_left"] += np.bincount(h1, weights=bi_left, minlength=n_ids).astype(np.int64)
        out["uni_counts"] += np.bincount(w, weights=bi_c, minlength=n_ids).astype(np.int64)
        out["uni_left"] += np.bincount(w, minlength=n_ids)
        out["bigram_types"] += len(bi)
    return out


def _merge_counts(
    keys: np.ndarray, counts: np.ndarray, more: np.ndarray, more_counts: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Two sets of distinct sorted keys with counts, as one (counts of shared keys added)."""
    return merge_counts(keys, counts, more, more_counts)


@dataclass(frozen=True, slots=True)
class Lookups:
    """The train counts each evaluation event needs, gathered once for all models."""

    tri: np.ndarray
    ctx: np.ndarray
    ctx_types: np.ndarray
    bi: np.ndarray
    bi_left: np.ndarray
    h1: np.ndarray
    h1_types: np.ndarray
    h1_left: np.ndarray
    uni: np.ndarray
    uni_left: np.ndarray

    @classmethod
    def of(cls, t: CountTables, ev: Events) -> Lookups:
        keys = pack([ev.h2, ev.h1, ev.w], t.bits)
        shift = np.uint64(t.bits)
        ctx = keys >> shift
        bi = keys & np.uint64(filler(2 * t.bits))
        h1 = ev.h1.astype(np.uint64)
        pos_ctx = positions(t.ctx_keys, ctx)
        pos_bi = positions(t.bi_keys, bi)
        pos_h1 = positions(t.h1_keys, h1)
        return cls(
            tri=lookup(t.tri_keys, t.tri_counts, keys),
            ctx=take(t.ctx_counts, pos_ctx),
            ctx_types=take(t.ctx_types, pos_ctx),
            bi=take(t.bi_counts, pos_bi),
            bi_left=take(t.bi_left, pos_bi),
            h1=take(t.h1_counts, pos_h1),
            h1_types=take(t.h1_types, pos_h1),
            h1_left=take(t.h1_left, pos_h1),
            uni=t.uni_counts[ev.w],
            uni_left=t.uni_left[ev.w],
        )


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den where den > 0, else 0 (callers mask those rows out)."""
    num = np.asarray(num, dtype=np.float64)
    den = np.asarray(den, dtype=np.float64)
    out: np.ndarray = np.divide(num, den, out=np.zeros(np.broadcast(num, den).shape), where=den > 0)
    return out


def add_k(t: CountTables, q: Lookups, order: int, k: float, space: int) -> np.ndarray:
    """Add-k probabilities of the events, for order 1, 2 or 3."""
    if order == 1:
        num, den = q.uni, np.full(len(q.uni), t.n_events)
    elif order == 2:
        num, den = q.bi, q.h1
    else:
        num, den = q.tri, q.ctx
    return (num + k) / (den + k * space)


def unigram_continuation(t: CountTables, q: Lookups, d: float, space: int, floor: bool) -> np.ndarray:
    """The Kneser-Ney unigram level (see the module docstring)."""
    if t.bigram_types == 0:
        return np.full(len(q.uni_left), 1.0 / space)
    if not floor:
        return q.uni_left / t.bigram_types
    seen = int(np.count_nonzero(t.uni_left))
    return (np.maximum(q.uni_left - d, 0.0) + d * seen / space) / t.bigram_types


def kneser_ney(t: CountTables, q: Lookups, order: int, d: float, space: int, *, floor: bool = True) -> np.ndarray:
    """Interpolated Kneser-Ney probabilities of the events, for order 2 or 3."""
    p1 = unigram_continuation(t, q, d, space, floor)
    seen_h1 = q.h1 > 0
    if order == 2:
        top = _ratio(np.maximum(q.bi - d, 0.0) + d * q.h1_types * p1, q.h1)
        return np.where(seen_h1, top, p1)
    middle = _ratio(np.maximum(q.bi_left - d, 0.0) + d * q.h1_types * p1, q.h1_left)
    p2 = np.where(seen_h1, middle, p1)
    top = _ratio(np.maximum(q.tri - d, 0.0) + d * q.ctx_types * p2, q.ctx)
    return np.where(q.ctx > 0, top, p2)


def perplexity(probs: np.ndarray) -> float | None:
    """``exp`` of the mean negative log-probability; None when some event has probability 0."""
    if len(probs) == 0:
        return None
    if (probs <= 0).any():
        return None
    return float(np.exp(-np.mean(np.log(probs))))


def _log_loss(probs: np.ndarray) -> float:
    """Summed negative natural-log probability; inf when some event has probability 0."""
    if (probs <= 0).any():
        return float("inf")
    return float(-np.log(probs).sum())


MODELS = ("uniform", "unigram_add_k", "bigram_add_k", "trigram_add_k", "bigram_kneser_ney", "trigram_kneser_ney")


def _chunk_losses(t: CountTables, ev: Events, space: int, k: float, d: float) -> dict[str, float]:
    q = Lookups.of(t, ev)
    return {
        "uniform": len(ev) * float(np.log(space)),
        "unigram_add_k": _log_loss(add_k(t, q, 1, k, space)),
        "bigram_add_k": _log_loss(add_k(t, q, 2, k, space)),
        "trigram_add_k": _log_loss(add_k(t, q, 3, k, space)),
        "bigram_kneser_ney": _log_loss(kneser_ney(t, q, 2, d, space)),
        "trigram_kneser_ney": _log_loss(kneser_ney(t, q, 3, d, space)),
    }


def evaluate(
    t: CountTables, ev: Events | Iterable[Events], *, space: int, k: float, d: float
) -> dict[str, float | None]:
    """Perplexity of every baseline model on one split's events (one array, or its chunks);
    the event count is under ``"events"``."""
    parts = [ev] if isinstance(ev, Events) else ev
    total = dict.fromkeys(MODELS, 0.0)
    n = 0
    for part in parts:
        n += len(part)
        for lo in range(0, len(part), EVAL_EVENTS):
            piece = Events(
                h2=part.h2[lo : lo + EVAL_EVENTS], h1=part.h1[lo : lo + EVAL_EVENTS], w=part.w[lo : lo + EVAL_EVENTS]
            )
            for model, loss in _chunk_losses(t, piece, space, k, d).items():
                total[model] += loss
    out: dict[str, float | None] = {"events": n}
    for model in MODELS:
        mean = total[model] / n if n else float("inf")
        out[model] = float(np.exp(mean)) if np.isfinite(mean) else None
    return out
