"""near_dedupe: MinHash estimates follow the binomial bound, banding follows 1 - (1 - s^r)^b, first kept."""

from __future__ import annotations

import math
import random
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from seqpipe.clean import parse_step
from seqpipe.clean.near_dedupe import NearDedupe, band_buckets, near_duplicate_keep, signatures
from seqpipe.errors import RecipeError


def pair_with_jaccard(rng: random.Random, union: int, shared: int, tag: str) -> tuple[str, str, float]:
    """Two documents of distinct invented words whose word sets (shingle = 1) have a known Jaccard."""
    words = [f"{tag}w{i}" for i in range(union)]
    rng.shuffle(words)
    common, rest = words[:shared], words[shared:]
    half = len(rest) // 2
    a, b = common + rest[:half], common + rest[half:]
    rng.shuffle(a)
    rng.shuffle(b)
    return " ".join(a), " ".join(b), shared / union


def test_estimate_within_binomial_bound() -> None:
    """Share of equal signature values estimates Jaccard: within 4 binomial standard deviations
    (Broder 1997: each value agrees with probability J, so the count is Binomial(H, J))."""
    rng = random.Random(3)
    hashes = 256
    for k, shared in enumerate([0, 10, 40, 80, 120, 160, 199]):
        a, b, jaccard = pair_with_jaccard(rng, 200, shared, f"p{k}")
        sig = signatures(pa.array([a, b]), shingle=1, hashes=hashes, seed=k)
        estimate = float((sig[0] == sig[1]).mean())
        bound = 4 * math.sqrt(jaccard * (1 - jaccard) / hashes) + 1 / hashes
        assert abs(estimate - jaccard) <= bound, (jaccard, estimate)


def test_shingles_of_words_match_the_set_definition() -> None:
    """With 5-word shingles, identical texts agree everywhere and reordered halves agree partly."""
    text = " ".join(f"v{i}" for i in range(60))
    moved = " ".join(f"v{i}" for i in list(range(30, 60)) + list(range(30)))
    sig = signatures(pa.array([text, text, moved, ""]), shingle=5, hashes=128, seed=0)
    assert (sig[0] == sig[1]).all()
    # shingles: 56 each; 52 shared (those not crossing the cut) -> Jaccard 52 / 60
    assert abs((sig[0] == sig[2]).mean() - 52 / 60) <= 4 * math.sqrt(52 / 60 * 8 / 60 / 128) + 1 / 128
    assert (sig[3] == 0xFFFFFFFF).all()  # no words: no shingle


@pytest.mark.parametrize(("similarity", "bands", "rows"), [(0.5, 8, 4), (0.7, 4, 6), (0.3, 20, 2)])
def test_banding_candidate_rate_follows_the_s_curve(similarity: float, bands: int, rows: int) -> None:
    """The share of pairs sharing a band is 1 - (1 - s^r)^b within 4 binomial standard deviations
    (Rajaraman and Ullman, Mining of Massive Datasets, chapter 3, section 3.4)."""
    rng = random.Random(11)
    pairs = 300
    docs: list[str] = []
    for p in range(pairs):
        a, b, _ = pair_with_jaccard(rng, 100, round(100 * similarity), f"q{p}")
        docs += [a, b]
    sig = signatures(pa.array(docs), shingle=1, hashes=bands * rows, seed=5)
    buckets = band_buckets(sig, bands, rows)
    hit = (buckets[0::2] == buckets[1::2]).any(axis=1)
    expected = 1 - (1 - similarity**rows) ** bands
    sd = math.sqrt(expected * (1 - expected) / pairs)
    assert abs(hit.mean() - expected) <= 4 * sd + 1 / pairs, (hit.mean(), expected)


def test_first_in_corpus_order_is_kept() -> None:
    """Of a group of near-duplicates the earliest stays; a document similar only to a dropped one is compared
    with kept documents only."""
    base = np.arange(32, dtype=np.uint32)
    near = base.copy()
    near[0] = 999  # 31/32 agree
    other = np.arange(100, 132, dtype=np.uint32)
    sig = np.stack([other, base, near, base, other + 1000])
    assert near_duplicate_keep(sig, 8, 4, 0.9).tolist() == [True, True, False, False, True]
    assert near_duplicate_keep(sig, 8, 4, 1.0).tolist() == [True, True, True, False, True]


def test_step_checks_its_parameters() -> None:
    """The step round-trips through its table and refuses parameters out of range, naming the key."""
    table = {"kind": "near_dedupe", "shingle": 3, "bands": 10, "rows": 5, "threshold": 0.7, "seed": 9}
    step = parse_step(table, "c")
    assert step.to_dict() == table and isinstance(step, NearDedupe) and step.hashes == 50
    for bad, key in [({"bands": 0}, "c.bands"), ({"threshold": 1.2}, "c.threshold"), ({"shingle": 0}, "c.shingle")]:
        with pytest.raises(RecipeError) as info:
            parse_step({"kind": "near_dedupe", **bad}, "c")
        assert info.value.key == key


def test_build_drops_near_duplicates_after_the_first(tmp_path: Path) -> None:
    """A build keeps the first of each near-duplicate group, counts the rest, and the counts add up."""
    from seqpipe import build
    from seqpipe.recipe import parse_recipe

    rng = random.Random(2)
    vocab = [f"oar{i}" for i in range(3000)]
    originals = [[rng.choice(vocab) for _ in range(120)] for _ in range(6)]
    docs = [" ".join(w) for w in originals]
    for w in originals[:3]:  # a clerk's copy with two words changed
        copy = list(w)
        copy[10], copy[90] = "ferry", "tide"
        docs.append(" ".join(copy))
    docs.append(docs[0])  # an exact copy
    (tmp_path / "in.txt").write_text("\n\n".join(docs) + "\n", encoding="utf-8")
    recipe = parse_recipe(
        '[[sources]]\nkind = "text"\npaths = "in.txt"\ndocument = "paragraph"\n\n'
        '[[clean]]\nkind = "dedupe"\n\n[[clean]]\nkind = "near_dedupe"\nthreshold = 0.7\n\n'
        "[splits]\ntrain = 1.0\nvalidation = 0.0\ntest = 0.0\n",
        tmp_path,
    )
    result = build(recipe, tmp_path / "out", workers=1, progress=False)
    summary = result.manifest["summary"]
    assert summary["duplicates_dropped"] == 1 and summary["near_duplicates_dropped"] == 3
    assert result.manifest["splits"]["train"]["documents"] == 6
    assert any("near-duplicates dropped: 3" in line for line in result.summary_lines())


def test_band_buckets_group_exactly_equal_bands_even_when_keys_collide(monkeypatch: pytest.MonkeyPatch) -> None:
    """Documents share a bucket exactly when they agree on the whole band, also when the folded
    64-bit keys of different bands collide (a zero multiplier keeps only each band's last value)."""
    import seqpipe.clean.near_dedupe as module

    rng = np.random.default_rng(2)
    sig = rng.integers(0, 3, size=(200, 8)).astype(np.uint32)  # few values: many equal bands
    expected = band_buckets(sig, 4, 2)
    monkeypatch.setattr(module, "_GOLDEN", np.uint64(0))
    for buckets in (expected, band_buckets(sig, 4, 2)):
        for b in range(4):
            same = buckets[:, b][:, None] == buckets[:, b][None, :]
            band = sig[:, 2 * b : 2 * b + 2]
            assert np.array_equal(same, (band[:, None, :] == band[None, :, :]).all(axis=2))


def test_word_hashes_follow_their_polynomial_definition(monkeypatch: pytest.MonkeyPatch) -> None:
    """The prefix-sum word hash equals the polynomial over each word's bytes computed word by word
    (sum of byte * B**(j + 1) mod 2**32, plus the length, then mixed), also across slices."""
    import seqpipe.clean.near_dedupe as module

    monkeypatch.setattr(module, "_SPAN", 7)  # many slices, words on both sides of every cut
    texts = ["", "ferry", "pier ß tide", "", "x" * 40, "landing-stage", "", "ö", "\x00", "\x00\x00"]
    arr = pa.array(texts, pa.large_string())
    expected = []
    for t in texts:
        acc = 0
        for j, b in enumerate(t.encode("utf-8")):
            acc = (acc + b * pow(int(module._BYTE_BASE), j + 1, 2**32)) % 2**32
        expected.append((acc + len(t.encode("utf-8"))) % 2**32)
    got = module._byte_hashes(arr)
    assert got.tolist() == [fmix32(v) for v in expected]
    assert len(set(got[-2:].tolist())) == 2  # NUL bytes count: the length tells "\0" and "\0\0" apart


def fmix32(h: int) -> int:
    """MurmurHash3's 32-bit finalizer, written from its published definition (Appleby, smhasher;
    from memory): xor-shift 16, times 0x85EBCA6B, xor-shift 13, times 0xC2B2AE35, xor-shift 16."""
    h ^= h >> 16
    h = h * 0x85EBCA6B % 2**32
    h ^= h >> 13
    h = h * 0xC2B2AE35 % 2**32
    return h ^ (h >> 16)


def test_fmix32_known_values() -> None:
    """fmix32 maps 0 to 0 (every step keeps 0) and is the finalizer above on other values; and
    a bijection on a sample (no two of 100,000 distinct inputs meet)."""
    import seqpipe.clean.near_dedupe as module

    xs = np.r_[np.arange(0, 50_000, dtype=np.uint32), np.uint32(0xFFFFFFFF) - np.arange(50_000, dtype=np.uint32)]
    got = module.fmix32(xs.copy())
    assert got[0] == 0
    assert [int(v) for v in got[:20]] == [fmix32(int(v)) for v in xs[:20]]
    assert [int(v) for v in got[-20:]] == [fmix32(int(v)) for v in xs[-20:]]
    assert len(np.unique(got)) == len(xs)


def test_k_functions_blocks_give_each_function_minimum(monkeypatch: pytest.MonkeyPatch) -> None:
    """Signature value i is min(a_i * x + b_i mod 2**32) over the document's 32-bit
    shingle hashes x, also when blocks cut through documents (a tiny block size)."""
    import seqpipe.clean.near_dedupe as module

    rng = np.random.default_rng(4)
    values = rng.integers(0, 2**32, size=300, dtype=np.int64).astype(np.uint32)
    doc = np.sort(rng.choice(np.array([0, 1, 3, 4]), size=300, p=[0.05, 0.8, 0.1, 0.05]))  # document 2 has none
    monkeypatch.setattr(module, "_BLOCK", 7)
    sig = module.k_functions(values, doc, 5, 16, 9)
    a = [int(m) % 2**32 | 1 for m in module.seeds(16, 9)]
    b = [int(o) % 2**32 for o in module.seeds(16, 9 ^ module._OFFSET_SEED)]
    for d in range(5):
        xs = [int(x) for x in values[doc == d]]
        want = [min((a[i] * x + b[i]) % 2**32 for x in xs) if xs else 0xFFFFFFFF for i in range(16)]
        assert sig[d].tolist() == want


def test_word_hashes_cut_words_as_the_quality_words_do() -> None:
    """Words found over the bytes in place are the words _quality.words cuts (Unicode whitespace,
    no word across documents, empty documents), with the same hash and document each."""
    import seqpipe.clean.near_dedupe as module
    from seqpipe.clean._quality import words

    texts = ["", "  ", " pier", "tide ", "\u3000ferry\u00a0oar\u2028rope", "é  ü", "\n\nq\tr ", "", "x\u200by", "a b"]
    arr = pa.array(texts, pa.large_string()).slice(1, 9)
    pieces = words(arr)
    got, doc = module._word_hashes(arr)
    assert doc.tolist() == pieces.doc.tolist()
    assert got.tolist() == module._byte_hashes(pieces.text).tolist()


def test_space_bytes_by_compares_equal_the_table_look_up() -> None:
    """The whitespace flag per byte from compares against runs of byte values equals
    _quality.space_bytes (its table and pyarrow's utf8_is_space) for every ASCII character and
    for multi-byte whitespace and letters."""
    import seqpipe.clean.near_dedupe as module
    from seqpipe.clean._quality import space_bytes, utf8_buffers

    texts = ["".join(chr(c) for c in range(128)), "\u3000ferry\u00a0oar\u2028rope\u0085", "", "é \x1c\x1f ü\x7f"]
    arr = pa.array(texts, pa.large_string()).slice(1)
    data = utf8_buffers(arr)[0]
    assert module._space_bytes(data).tolist() == space_bytes(arr).tolist()
    whole = pa.array(texts, pa.large_string())
    assert module._space_bytes(utf8_buffers(whole)[0]).tolist() == space_bytes(whole).tolist()


def test_wide_spaces_are_every_whitespace_code_point_pyarrow_knows() -> None:
    """_space_bytes asks pyarrow about a short list of candidates (Unicode's White_Space
    property, PropList.txt, plus three that older versions counted): a scan of every code point
    beyond ASCII finds exactly the whitespace that list gives."""
    import pyarrow.compute as pc

    import seqpipe.clean.near_dedupe as module

    cps = np.r_[np.arange(0x80, 0xD800), np.arange(0xE000, 0x110000)]
    chars = pa.array([chr(c) for c in cps.tolist()], pa.large_string())
    every = cps[np.asarray(pc.utf8_is_space(chars).to_numpy(zero_copy_only=False), dtype=bool)]
    assert every.tolist() == module._wide_spaces().code_points.tolist()
    assert 0x3000 in every.tolist() and 0xA0 in every.tolist()  # (PropList.txt, from memory)


def test_space_bytes_equal_the_table_look_up_on_random_text() -> None:
    """Over random text from every plane, with every whitespace code point mixed in, the
    prefiltered _space_bytes equals _quality.space_bytes (pyarrow's utf8_is_space per code point)."""
    import seqpipe.clean.near_dedupe as module
    from seqpipe.clean._quality import space_bytes, utf8_buffers

    rng = np.random.default_rng(8)
    spaces = [chr(c) for c in module._wide_spaces().code_points.tolist()] + [" ", "\t", "\n", "\x1c"]
    pool = [c for c in rng.integers(0x20, 0x110000, size=4000).tolist() if not 0xD800 <= c < 0xE000]
    texts = []
    for _ in range(200):
        k = int(rng.integers(0, 30))
        picks = [chr(pool[i]) for i in rng.integers(0, len(pool), size=k)]
        picks += [spaces[i] for i in rng.integers(0, len(spaces), size=int(rng.integers(0, 6)))]
        rng.shuffle(picks)
        texts.append("".join(picks))
    arr = pa.array(texts, pa.large_string())
    data = utf8_buffers(arr)[0]
    assert module._space_bytes(data).tolist() == space_bytes(arr).tolist()


def test_word_hashes_cut_random_documents_as_the_quality_words_do() -> None:
    """Random documents of words, Unicode whitespace and empty documents, in slices of the array:
    the words (their hashes and documents) are those _quality.words cuts."""
    import seqpipe.clean.near_dedupe as module
    from seqpipe.clean._quality import words

    rng = np.random.default_rng(21)
    pieces = ["ab", "é", "x", "\u3000", " ", "\n", "\u00a0", "", "tide", "\u2028", "z"]
    for trial in range(30):
        texts = ["".join(rng.choice(pieces, size=int(rng.integers(0, 6)))) for _ in range(int(rng.integers(1, 12)))]
        arr = pa.array(["pad", *texts], pa.large_string()).slice(1)
        expected = words(arr)
        got, doc = module._word_hashes(arr)
        assert doc.tolist() == expected.doc.tolist(), (trial, texts)
        assert got.tolist() == module._byte_hashes(expected.text).tolist(), (trial, texts)
    got, doc = module._word_hashes(pa.array(["ab", "", "cd"], pa.large_string()))
    assert doc.tolist() == [0, 2]
