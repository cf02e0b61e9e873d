"""The report entry points: corpus_report, write_dataset_report, write_report (seqpipe.report)."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import pytest
from memory_dataset import MemoryDataset, dataset_from_documents

from seqpipe.errors import RecipeError
from seqpipe.report import corpus_report, write_dataset_report, write_report
from seqpipe.report.render import PLOTS_HINT

TRAIN = ["the cat sat on the mat", "the dog sat on the log", "the cat saw the dog"]
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


def small() -> MemoryDataset:
    return dataset_from_documents(
        {"train": [s.split() for s in TRAIN], "validation": [["the", "cat", "sat"]], "test": [["the", "dog"], []]}
    )


def test_report_is_strict_json() -> None:
    """Every figure survives JSON without NaN or infinity, and the sections are all there."""
    report = corpus_report(small(), progress=False)
    text = json.dumps(report, allow_nan=False)
    assert json.loads(text) == report
    assert {"splits", "top_ngrams", "leakage", "perplexity", "notes"} <= set(report)
    assert (
        "predicted" in report["perplexity"] and "begin markers are never predicted" in report["perplexity"]["predicted"]
    )


def test_write_writes_markdown_json_and_plot(tmp_path: Path) -> None:
    """report.md, report.json (equal to the returned dict) and a PNG rank-frequency plot."""
    pytest.importorskip("matplotlib")
    report = write_dataset_report(small(), tmp_path / "out", progress=False)
    out = tmp_path / "out"
    assert json.loads((out / "report.json").read_text()) == report
    assert (out / "rank_frequency.png").read_bytes()[:8] == PNG_SIGNATURE
    md = (out / "report.md").read_text()
    assert "![rank-frequency](rank_frequency.png)" in md and PLOTS_HINT not in md
    assert "| bigram add-k |" in md and "Leakage" in md
    assert report["plots"] == ["rank_frequency.png"]


def test_without_matplotlib_the_figures_are_still_written(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """With matplotlib unimportable the Markdown says how to get plots and everything else is written."""
    for name in ("matplotlib", "matplotlib.figure", "matplotlib.backends", "matplotlib.backends.backend_agg"):
        monkeypatch.setitem(sys.modules, name, None)
    report = write_dataset_report(small(), tmp_path, progress=False)
    assert not (tmp_path / "rank_frequency.png").exists()
    assert PLOTS_HINT in (tmp_path / "report.md").read_text()
    assert json.loads((tmp_path / "report.json").read_text())["splits"] == report["splits"]
    assert report["plots"] == []


@pytest.mark.parametrize(
    ("key", "value"), [("add_k", 0.0), ("ngram_n", 0), ("top_k", -1), ("kn_discount", 1.5), ("progress", "yes")]
)
def test_bad_options_name_the_key(key: str, value: object) -> None:
    """A bad option raises RecipeError naming the option and the value."""
    with pytest.raises(RecipeError, match=key):
        corpus_report(small(), **{key: value})  # type: ignore[arg-type]


def test_dataset_without_train_reports_what_it_can() -> None:
    """Without a train split: per-split figures only, and a note saying so."""
    full = small()
    only_val = MemoryDataset(
        vocabulary=full.vocabulary,
        encoder=full.encoder,
        parts={"validation": full.parts["validation"]},
        fingerprint="x",
    )
    report = corpus_report(only_val, progress=False)
    assert set(report["splits"]) == {"validation"} and "perplexity" not in report
    assert any("no 'train' split" in note for note in report["notes"])


def test_top_k_limits_the_ngram_lists() -> None:
    """top_k caps each n-gram list, keeping the most frequent first."""
    report = corpus_report(small(), top_k=2, progress=False)
    assert [len(v) for v in report["top_ngrams"].values()] == [2, 2, 2]
    assert report["top_ngrams"]["2"][0]["count"] >= report["top_ngrams"]["2"][1]["count"]


def test_token_stream_input_is_read_like_an_array() -> None:
    """A split whose stream is a seqpipe.stream.TokenStream over several chunks reports the same
    figures as the same ids held in one array."""
    from memory_dataset import MemorySplit

    from seqpipe.stream import TokenStream

    ds = small()
    chunked = {}
    for name, part in ds.parts.items():
        ids = part.stream
        cut = len(ids) // 2
        chunked[name] = MemorySplit(
            stream=TokenStream([ids[:cut], ids[cut:]]),  # type: ignore[arg-type]
            documents=part.documents,
        )
    other = MemoryDataset(vocabulary=ds.vocabulary, encoder=ds.encoder, parts=chunked, fingerprint=ds.fingerprint)
    assert corpus_report(other, progress=False) == corpus_report(ds, progress=False)


RECIPE = """
[[sources]]
kind = "text"
paths = "logs/*.txt"
document = "paragraph"
[tokenizer]
kind = "words"
[splits]
train = 0.6
validation = 0.2
test = 0.2
[shards]
tokens = 200
"""

# invented demo sentences (a ferry service's log), not a reference
LINES = [
    "the ferry left the north dock at dawn",
    "fog on the water and a calm tide",
    "cargo of rope and lanterns for the harbour",
    "the pilot wrote the tide in the ledger",
    "a squall from the south kept the ferry at the dock",
]


def _contents(split: object, begin: int, end: int) -> list[tuple[int, ...]]:
    """Each document's ids without its begin/end markers, by plain Python slicing."""
    ids = split.stream.slice(0, split.num_tokens).tolist()  # type: ignore[attr-defined]
    out = []
    for start, length in zip(
        split.documents.column("start").to_pylist(),  # type: ignore[attr-defined]
        split.documents.column("length").to_pylist(),
        strict=True,
    ):
        doc = ids[start : start + length]
        if doc and doc[0] == begin:
            doc = doc[1:]
        if doc and doc[-1] == end:
            doc = doc[:-1]
        out.append(tuple(doc))
    return out


def test_write_report_on_a_built_dataset(tmp_path: Path) -> None:
    """write_report on a dataset from seqpipe.build: sizes equal the dataset's, and the documents
    reported as duplicated in validation/test are exactly those whose ids equal a train document's
    (planted: one sentence written with 1..12 spaces, so its text hashes differ but its ids do not)."""
    from seqpipe import build
    from seqpipe.dataset import open_dataset
    from seqpipe.recipe import parse_recipe

    (tmp_path / "logs").mkdir()
    for f in range(4):
        paras = [f"{LINES[(f + i) % len(LINES)]} on day {f * 30 + i}" for i in range(30)]
        paras += ["the same notice was" + " " * (3 * f + k) + "pinned in every cabin" for k in range(1, 4)]
        (tmp_path / "logs" / f"day{f}.txt").write_text("\n\n".join(paras) + "\n", encoding="utf-8")
    build(parse_recipe(RECIPE, root=tmp_path), tmp_path / "ds", workers=1, progress=False)
    report = write_report(tmp_path / "ds", tmp_path / "rep", ngram_n=4, progress=False)
    ds = open_dataset(tmp_path / "ds")
    begin, end = ds.vocabulary.id_of("begin"), ds.vocabulary.id_of("end")
    train = set(_contents(ds.split("train"), begin, end))  # type: ignore[arg-type]
    planted = 0
    for name in ds.splits:
        split = ds.split(name)
        assert report["splits"][name]["documents"] == split.num_documents
        assert report["splits"][name]["tokens"] == split.num_tokens
        lengths = split.documents.column("length").to_numpy()
        assert report["splits"][name]["document_length"]["max"] == int(lengths.max())
        if name != "train":
            expected = sum(1 for c in _contents(split, begin, end) if c and c in train)  # type: ignore[arg-type]
            assert report["leakage"]["documents"][name]["duplicated"] == expected
            planted += expected
    assert planted >= 1
    assert json.loads((tmp_path / "rep" / "report.json").read_text()) == report
    assert (tmp_path / "rep" / "report.md").read_text().startswith("# Corpus report")


def test_vocabulary_too_large_for_trigram_keys() -> None:
    """Above 2**21 - 1 ids three 22-bit slots no longer fit a 64-bit key: trigram figures and
    perplexities are left out with a note, everything else is reported."""
    import numpy as np
    import pyarrow as pa
    from memory_dataset import MemorySplit, SpacedEncoder

    from seqpipe.tokenizers.words import WordTokenizer
    from seqpipe.vocab import Vocabulary

    size = 1 << 21
    tokens = pa.array([b"<unk>", b"<pad>", b"<bos>", b"<eos>"] + [b"w%d" % i for i in range(size - 4)])
    vocab = Vocabulary(
        tokens=tokens,
        counts=np.zeros(size, np.int64),
        n_reserved=4,
        roles={"unknown": 0, "padding": 1, "begin": 2, "end": 3},
    )
    stream = np.array([2, 5, size - 1, 5, 3], dtype=np.uint32)
    docs = pa.table({"start": pa.array([0], pa.int64()), "length": pa.array([5], pa.int64())})
    ds = MemoryDataset(
        vocabulary=vocab,
        encoder=SpacedEncoder(WordTokenizer(), vocab),
        parts={"train": MemorySplit(stream, docs), "test": MemorySplit(stream, docs)},
        fingerprint="big",
    )
    report = corpus_report(ds, progress=False)
    assert set(report["top_ngrams"]) == {"1", "2"} and "perplexity" not in report
    assert report["top_ngrams"]["2"][0]["ids"] in ([5, size - 1], [size - 1, 5])
    assert report["leakage"]["documents"]["test"]["duplicated"] == 1
    assert any("too large" in note for note in report["notes"])


def test_bits_per_byte_divide_by_the_bytes_of_the_split_text(tmp_path: Path) -> None:
    """The build records each split's UTF-8 bytes and characters of its cleaned documents (found
    here by the documents' text hashes, XXH3-128 of the UTF-8 text); the report's bits per byte
    (per character) of every model is log2(perplexity) * events / bytes (/ characters)."""
    import xxhash

    from seqpipe import build
    from seqpipe.dataset import open_dataset
    from seqpipe.recipe import parse_recipe

    (tmp_path / "logs").mkdir()
    texts: dict[bytes, str] = {}
    for f in range(3):
        # invented ferry-log lines with multi-byte characters, so bytes and characters differ
        paras = [f"{LINES[(f + i) % len(LINES)]} near Ærø café № {f * 40 + i}" for i in range(40)]
        texts.update({xxhash.xxh3_128_digest(p.encode()): p for p in paras})
        (tmp_path / "logs" / f"day{f}.txt").write_text("\n\n".join(paras) + "\n", encoding="utf-8")
    build(parse_recipe(RECIPE, root=tmp_path), tmp_path / "ds", workers=1, progress=False)
    ds = open_dataset(tmp_path / "ds")
    report = corpus_report(ds, progress=False)
    ppl = report["perplexity"]
    for name in ("validation", "test"):
        docs = [texts[h] for h in ds.split(name).documents.column("hash").to_pylist()]
        summary = ds.manifest["summary"]["splits"][name]
        assert summary["bytes"] == sum(len(d.encode("utf-8")) for d in docs)
        assert summary["characters"] == sum(len(d) for d in docs) < summary["bytes"]
        entry = ppl["splits"][name]
        assert (entry["text_bytes"], entry["characters"]) == (summary["bytes"], summary["characters"])
        for model in ("uniform", "trigram_kneser_ney"):
            total_bits = math.log2(entry[model]) * entry["events"]
            assert entry["bits_per_byte"][model] == pytest.approx(total_bits / summary["bytes"])
            assert entry["bits_per_character"][model] == pytest.approx(total_bits / summary["characters"])
    assert "bits per byte" in ppl["per_text"].lower() and "no bytes" in ppl["per_text"]
    assert report["dataset"]["name"].startswith("dataset (")


def test_in_memory_dataset_without_text_sizes_says_so() -> None:
    """Without bytes/characters in the build summary, bits per byte are null and a note says why."""
    report = corpus_report(small(), progress=False)
    entry = report["perplexity"]["splits"]["validation"]
    assert entry["bits_per_byte"]["uniform"] is None and entry["text_bytes"] is None
    assert any("rebuild the dataset" in note for note in report["notes"])
