"""The corpus report: gather every figure of a dataset, then write Markdown, JSON and plots."""

from __future__ import annotations

import math
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

import numpy as np

from seqpipe._parse import parse_bool, parse_float, parse_int
from seqpipe.errors import RecipeError, SeqpipeError
from seqpipe.metrics import loss_figures
from seqpipe.report import leakage, lm, near, spill, stats
from seqpipe.report.corpus import DatasetLike, Roles, SplitShape, SplitTokens, read_chunks, scan_split, stream_dtype
from seqpipe.report.ngrams import count_ngrams, key_bits, max_order, unpack

REPORT_FORMAT: Final = "seqpipe.report/2"
TRAIN: Final = "train"
TOP_ORDERS: Final = (1, 2, 3)

PREDICTED: Final = (
    "Each document is one sentence. Predicted: every content token (the document minus its "
    "begin/end markers) and, for each document that ends with the end marker, that end token "
    "after the last content token ({ended} of {documents} evaluated documents); begin markers "
    "are never predicted. Contexts are padded on the left with {begin}. "
    "Event space: the vocabulary without the padding token ({space} ids). Models are fitted on "
    "the train split's events. Kneser-Ney: discount {d} at every order; its unigram level is the "
    "continuation distribution interpolated with the uniform one, so no event has probability 0."
)
ZIPF_NOTE: Final = (
    "Zipf fits and rank-frequency curves exclude reserved tokens (the unknown token too). The fit is the "
    "discrete power-law maximum-likelihood estimate of Clauset, Shalizi & Newman (2009) on the counts of "
    "token types at or above x_min (x_min chosen by their Kolmogorov-Smirnov method); alpha is the exponent "
    "of the count distribution, rank_exponent = 1/(alpha-1) that of rank-frequency (Zipf's s)."
)
PER_TEXT: Final = (
    "Bits per byte: a model's total negative log2-likelihood over a split's events divided by the UTF-8 bytes "
    "of the split's cleaned documents as stored before tokenization (the build summary's bytes); bits per "
    "character divides by their Unicode code points (characters). Equivalently log2(perplexity) x events / bytes. "
    "Every byte of the document text counts, newlines and whitespace the tokenizer drops included; begin/end "
    "markers add no bytes, yet a predicted end marker adds its loss; an unknown token is one event, and the "
    "bytes of the text it replaced are counted. Unlike perplexity, these compare across tokenizers of one text."
)
NO_TEXT_SIZES: Final = (
    "The build summary records no text bytes/characters for {splits} (a dataset built before they were "
    "recorded, or one held in memory): no bits per byte or per character; rebuild the dataset to get them."
)


@contextmanager
def _progress(total: int, enabled: bool) -> Iterator[Any]:
    """A tqdm bar over the report's steps, shown only on a terminal and when asked for."""
    from seqpipe.progress import bar

    steps = bar(total, "report", unit="step", show=enabled and sys.stderr.isatty())
    try:
        yield steps
    finally:
        steps.close()


def _check(ngram_n: int, top_k: int, add_k: float, kn_discount: float, progress: bool) -> None:
    parse_int("ngram_n", ngram_n, minimum=1)
    parse_int("top_k", top_k, minimum=1)
    if parse_float("add_k", add_k, minimum=0.0) <= 0:
        raise RecipeError("add_k", f"expected a number > 0, got {add_k!r}")
    if parse_float("kn_discount", kn_discount, minimum=0.0, maximum=1.0) <= 0:
        raise RecipeError("kn_discount", f"expected a number in (0, 1], got {kn_discount!r}")
    parse_bool("progress", progress)


@dataclass(frozen=True, slots=True)
class _Source:
    """How the report reads the dataset's splits: one id type for all, and the roles of ids."""

    dataset: DatasetLike
    roles: Roles
    dtype: np.dtype[Any]

    def chunks(self, name: str) -> Iterator[SplitTokens]:
        return read_chunks(self.dataset, name, self.roles, dtype=self.dtype)


def _top_ngrams(source: _Source, bits: int, top_k: int, workdir: Path, rows: int) -> dict[str, Any]:
    """The ``top_k`` most frequent train n-grams of each order (ties in id order): each group's counts
    are spilled to disk by n-gram hash (see :mod:`seqpipe.report.spill`), then counted partition by
    partition; ``rows`` (the split's content tokens) sizes the partitions."""
    orders = [n for n in TOP_ORDERS if n <= max_order(bits)]
    parts = spill.partition_count(rows)
    spills = {n: spill.Spill(workdir, f"top-{n}", parts) for n in orders}
    for chunk in source.chunks(TRAIN):
        found = count_ngrams(chunk.ids, orders, bits=bits, starts=chunk.content_starts, lengths=chunk.content_lengths)
        for n, part in found.items():
            spills[n].add(part.keys, part.counts, part.keys)
        del found
    out: dict[str, Any] = {}
    for n, table in spills.items():
        keys, freq = spill.top_of_spill(table, top_k)
        rows_ = unpack(keys, n, bits)
        out[str(n)] = [
            {"tokens": [source.dataset.encoder.token_text(int(i)) for i in row], "ids": row.tolist(), "count": int(c)}
            for row, c in zip(rows_, freq, strict=True)
        ]
    return out


def collect(
    dataset: DatasetLike,
    *,
    ngram_n: int = 13,
    top_k: int = 20,
    add_k: float = 1.0,
    kn_discount: float = 0.75,
    progress: bool = True,
) -> tuple[dict[str, Any], dict[str, stats.RankCurve]]:
    """The report and, per split, its rank-frequency curve and Zipf fit (for plots)."""
    _check(ngram_n, top_k, add_k, kn_discount, progress)
    vocab = dataset.vocabulary
    roles = Roles.of(vocab)
    bits = key_bits(roles.vocab_size)
    names = tuple(dataset.splits)
    others = [n for n in names if n != TRAIN]
    has_train = TRAIN in names
    notes: list[str] = [ZIPF_NOTE]
    report: dict[str, Any] = {
        "format": REPORT_FORMAT,
        "dataset": {
            "name": _dataset_name(dataset),
            "fingerprint": dataset.fingerprint,
            "vocabulary_entries": roles.vocab_size,
            "reserved": [vocab.token(i).decode("utf-8", "backslashreplace") for i in range(roles.n_reserved)],
            "roles": dict(sorted(vocab.roles.items())),
            "splits": list(names),
        },
        "settings": {"ngram_n": ngram_n, "top_k": top_k, "add_k": add_k, "kn_discount": kn_discount},
    }
    steps = len(names) + (3 + 2 * len(others) if has_train else 0)
    curves: dict[str, stats.RankCurve] = {}
    with _progress(steps, progress) as bar:
        dtypes = [stream_dtype(dataset, name) for name in names]
        source = _Source(dataset, roles, np.result_type(*dtypes) if dtypes else np.dtype(np.uint32))
        shapes: dict[str, SplitShape] = {}
        counts: dict[str, np.ndarray] = {}
        for name in names:
            shapes[name], counts[name] = scan_split(dataset, name, roles, source.dtype)
        ranking = stats.frequency_ranking(counts[TRAIN], roles.n_reserved) if has_train else None
        report["splits"] = {}
        alphabet = stats.is_alphabet(vocab)
        for name, s in shapes.items():
            own = stats.frequency_ranking(counts[name], roles.n_reserved)
            zipf, fit = stats.zipf_figures(counts[name], own, alphabet)
            report["splits"][name] = stats.split_stats(s, counts[name], roles, ranking, zipf)
            curves[name] = stats.RankCurve(counts[name][own], int(s.content_lengths.sum()), fit)
            bar.update()
        reuse = _vocabulary_reuse(dataset, counts, shapes, roles)
        if reuse is not None:
            report["vocabulary_reuse"] = reuse
        if not has_train:
            notes.append(
                "The dataset has no 'train' split: coverage, n-grams, leakage and perplexities are not reported."
            )
        else:
            with tempfile.TemporaryDirectory(prefix="seqpipe-report-") as tmp:
                rows = int(shapes[TRAIN].content_lengths.sum()) + shapes[TRAIN].num_documents
                report["top_ngrams"] = _top_ngrams(source, bits, top_k, Path(tmp), rows)
                if max_order(bits) < 3:
                    notes.append(
                        "The vocabulary is too large to pack trigrams into 64-bit keys: "
                        "no trigram counts and no perplexities."
                    )
                bar.update()
                report["leakage"] = _leakage(source, others, ngram_n, bar)
                notes += _sampling_notes(report["leakage"])
                if max_order(bits) >= 3:
                    spilled = _Fit(source, shapes, Path(tmp), rows)
                    report["perplexity"] = _perplexity(spilled, others, bits, add_k, kn_discount, bar)
                    notes += _add_per_text(report["perplexity"], {name: _text_sizes(dataset, name) for name in others})
    report["notes"] = notes
    return report, curves


def _vocabulary_reuse(
    dataset: DatasetLike, counts: dict[str, np.ndarray], loaded: dict[str, SplitShape], roles: Roles
) -> dict[str, Any] | None:
    """For a dataset built with ``[vocabulary] reuse_from``: which dataset the vocabulary came from
    and, per split, the unknown rate and the share of the vocabulary that occurs (None otherwise)."""
    manifest = getattr(dataset, "manifest", None) or {}
    source = manifest.get("vocabulary", {}).get("reused_from")
    if not isinstance(source, dict):
        return None
    return {
        "dataset": source.get("dataset"),
        "fingerprint": source.get("fingerprint"),
        "splits": {
            name: stats.vocabulary_use(counts[name], roles, int(s.content_lengths.sum())) for name, s in loaded.items()
        },
    }


def _leakage(source: _Source, others: list[str], n: int, bar: Any) -> dict[str, Any]:
    dataset = source.dataset
    texts = {name: _text_hashes(dataset, name) for name in [TRAIN, *others]}
    train_docs = leakage.TrainDocuments.of(source.chunks(TRAIN))
    train_windows = leakage.WindowSet.of(source.chunks(TRAIN), n)
    bar.update()
    out: dict[str, Any] = {"documents": {}, "ngrams": {}}

    def decode(ids: np.ndarray) -> str:
        return dataset.encoder.decode(ids)

    for name in others:
        out["documents"][name] = leakage.duplicate_documents_chunked(
            train_docs, source.chunks(name), train_text=texts[TRAIN], other_text=texts[name], decode=decode
        )
        out["ngrams"][name] = leakage.shared_ngrams_chunked(train_windows, source.chunks(name), n)
        bar.update()
    manifest = getattr(dataset, "manifest", None)
    others_chunks = {name: source.chunks(name) for name in others}
    train_documents = len(dataset.split(TRAIN).documents)
    out["near_copies"] = near.leakage_section(manifest, source.chunks(TRAIN), train_documents, others_chunks, decode)
    return out


def _sampling_notes(leaks: dict[str, Any]) -> list[str]:
    """A note for each split whose shared n-gram share is estimated on a sample of hashes."""
    out = []
    for name, entry in leaks["ngrams"].items():
        sample = entry.get("sample")
        if sample is not None:
            out.append(
                f"Shared {entry['n']}-grams of {name!r} are estimated: the train split has more distinct windows "
                f"than the report keeps, so only window hashes below 2**64/{sample['every']} are compared "
                f"({sample['windows']} of {entry['windows']} windows); standard error of the share "
                f"{sample['standard_error']:.2g} (binomial, treating sampled windows as independent)."
            )
    return out


def _text_hashes(dataset: DatasetLike, name: str) -> Any:
    docs = dataset.split(name).documents
    return docs.column("hash").combine_chunks() if "hash" in docs.column_names else None


@dataclass(frozen=True, slots=True)
class _Fit:
    """What fitting the baseline models reads: the splits, their shapes, a directory for the train
    counts spilled to disk, and about how many train events there are (sizes the partitions)."""

    source: _Source
    shapes: dict[str, SplitShape]
    workdir: Path
    rows: int


def _perplexity(fit: _Fit, others: list[str], bits: int, add_k: float, d: float, bar: Any) -> dict[str, Any]:
    source, shapes = fit.source, fit.shapes
    roles = source.roles
    space = lm.event_space(roles)
    queries = lm.query_keys((lm.events(c, roles) for name in others for c in source.chunks(name)), bits)
    train_events = (lm.events(c, roles) for c in source.chunks(TRAIN))
    partitions = spill.partition_count(fit.rows)
    tables = lm.CountTables.fit_spilled(
        train_events, queries, bits, roles.vocab_size + 1, workdir=fit.workdir, partitions=partitions
    )
    del queries
    bar.update()
    begin = "the begin token" if roles.begin is not None else "a virtual begin id (no begin token)"
    ended = sum(int(shapes[n].has_end.sum()) for n in others)
    documents = sum(shapes[n].num_documents for n in others)
    out: dict[str, Any] = {
        "predicted": PREDICTED.format(ended=ended, documents=documents, begin=begin, space=space, d=d),
        "event_space": space,
        "train_events": tables.n_events,
        "splits": {},
    }
    for name in others:
        parts = (lm.events(c, roles) for c in source.chunks(name))
        out["splits"][name] = lm.evaluate(tables, parts, space=space, k=add_k, d=d)
        bar.update()
    return out


def _dataset_name(dataset: DatasetLike) -> str:
    """The recipe's dataset name with the fingerprint's first 12 digits (the fingerprint alone
    for a dataset without a manifest)."""
    manifest = getattr(dataset, "manifest", None) or {}
    name = manifest.get("recipe", {}).get("dataset", {}).get("name")
    short = dataset.fingerprint[:12]
    return f"{name} ({short})" if isinstance(name, str) else short


def _text_sizes(dataset: DatasetLike, name: str) -> tuple[int | None, int | None]:
    """UTF-8 bytes and characters of split ``name``'s cleaned documents, from the build summary
    (None where the manifest does not record them)."""
    manifest = getattr(dataset, "manifest", None) or {}
    figures = manifest.get("summary", {}).get("splits", {}).get(name, {})
    n_bytes, chars = figures.get("bytes"), figures.get("characters")
    return (n_bytes if isinstance(n_bytes, int) else None, chars if isinstance(chars, int) else None)


def _add_per_text(ppl: dict[str, Any], sizes: dict[str, tuple[int | None, int | None]]) -> list[str]:
    """Beside each perplexity, bits per byte and per character of the same model on the same split;
    returns the notes to add (splits without recorded text sizes)."""
    ppl["per_text"] = PER_TEXT
    for name, entry in ppl["splits"].items():
        n_bytes, chars = sizes[name]
        entry["text_bytes"], entry["characters"] = n_bytes, chars
        entry["bits_per_byte"], entry["bits_per_character"] = {}, {}
        for model in lm.MODELS:
            value = entry[model]
            fig = None
            if value is not None and entry["events"] > 0:
                fig = loss_figures(
                    math.log(value) * entry["events"],
                    tokens=entry["events"],
                    text_bytes=n_bytes or None,
                    characters=chars or None,
                )
            entry["bits_per_byte"][model] = fig.bits_per_byte if fig else None
            entry["bits_per_character"][model] = fig.bits_per_character if fig else None
    missing = [name for name, (n_bytes, _) in sizes.items() if n_bytes is None]
    return [NO_TEXT_SIZES.format(splits=", ".join(missing))] if missing else []


def corpus_report(
    dataset: DatasetLike,
    *,
    ngram_n: int = 13,
    top_k: int = 20,
    add_k: float = 1.0,
    kn_discount: float = 0.75,
    progress: bool = True,
) -> dict[str, Any]:
    """Every figure of the corpus report of ``dataset``, as a JSON-serializable dict.

    Per split: sizes, document lengths, unknown-token rate, coverage by the most
    frequent train ids, Zipf fit; for train: the most frequent uni/bi/trigrams;
    train/validation/test leakage (duplicated documents, shared ``ngram_n``-grams);
    baseline perplexities (uniform, add-``add_k`` uni/bi/trigram, interpolated
    Kneser-Ney bi/trigram with ``kn_discount``). ``report["perplexity"]["predicted"]``
    states exactly which tokens are predicted. For a dataset that reused another's
    vocabulary, ``report["vocabulary_reuse"]`` names that dataset and gives per split the
    unknown rate and the share of the vocabulary's non-reserved entries that occur.
    """
    return collect(dataset, ngram_n=ngram_n, top_k=top_k, add_k=add_k, kn_discount=kn_discount, progress=progress)[0]


def write_report(
    dataset_dir: str | Path,
    out_dir: str | Path,
    *,
    ngram_n: int = 13,
    top_k: int = 20,
    add_k: float = 1.0,
    kn_discount: float = 0.75,
    progress: bool = True,
) -> dict[str, Any]:
    """Open the dataset at ``dataset_dir`` and write ``report.md``, ``report.json`` and
    ``rank_frequency.png`` (when matplotlib is installed) into ``out_dir``; return the report."""
    from seqpipe.dataset import open_dataset

    dataset = open_dataset(dataset_dir)  # a URI is read from a local copy
    return write_dataset_report(
        dataset, out_dir, ngram_n=ngram_n, top_k=top_k, add_k=add_k, kn_discount=kn_discount, progress=progress
    )


def write_dataset_report(dataset: DatasetLike, out_dir: str | Path, **options: Any) -> dict[str, Any]:
    """:func:`write_report` for an already opened dataset (or an in-memory one)."""
    from seqpipe.report import plots, render

    report, curves = collect(dataset, **options)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SeqpipeError(f"{out}: cannot create the report directory ({exc})") from exc
    title = _dataset_name(dataset)
    drawn = plots.rank_frequency_png(out / plots.RANK_FREQUENCY_PNG, curves, title=title)
    report["plots"] = [plots.RANK_FREQUENCY_PNG] if drawn else []
    render.write_text(out / "report.json", render.to_json(report))
    render.write_text(out / "report.md", render.to_markdown(report, plots_drawn=drawn))
    return report
