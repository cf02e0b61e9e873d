"""The build's phases on a tiny corpus: a part is ingested, counted and encoded, and the parts
cache is keyed by what ingest depends on (seqpipe/ingest.py, the phase functions in _build.py)."""

from __future__ import annotations

import collections
from pathlib import Path

import numpy as np
import pytest

from seqpipe._build import Context, Plan, assign, count, encode, fit, ingest, plan_build
from seqpipe.counts import CountMerger
from seqpipe.executors import InlineExecutor, TaskPool
from seqpipe.ingest import encoded_path, load_part_meta, part_key, read_encoded, release_encoded
from seqpipe.recipe import Recipe, parse_recipe
from seqpipe.vocab import VocabSpec, Vocabulary

# invented logbook lines, words separated by single spaces (so str.split gives the tokens)
DOCS = (
    "the ferry left the quay at dawn",
    "fog on the river and the ferry waited",
    "two goats and a harmonium crossed at noon",
    "the quay was dry at dusk",
)

RECIPE = """\
[[sources]]
kind = "text"
paths = "logs/*.txt"
document = "paragraph"
{clean}
[tokenizer]
kind = "words"
[splits]
train = 1.0
validation = 0.0
test = 0.0
"""


def tiny_recipe(root: Path, clean: str = "") -> Recipe:
    """DOCS as paragraphs of one text file under ``root``, and a words recipe with everything in train."""
    (root / "logs").mkdir(parents=True, exist_ok=True)
    (root / "logs" / "day-1.txt").write_text("\n\n".join(DOCS) + "\n", encoding="utf-8")
    return parse_recipe(RECIPE.format(clean=clean), root)


def context(recipe: Recipe, root: Path) -> Context:
    cache = root / "cache"
    (cache / "parts").mkdir(parents=True, exist_ok=True)
    return Context(recipe, TaskPool(InlineExecutor()), cache, show=False)


def test_a_part_is_ingested_counted_and_encoded(tmp_path: Path) -> None:
    """One part goes through ingest, count, fit and encode: the cache holds it, the counts are
    the corpus's word counts in first-occurrence order, and the ids decode to the documents."""
    recipe = tiny_recipe(tmp_path)
    ctx = context(recipe, tmp_path)
    plan = plan_build(recipe, ctx.cache, part_bytes=1 << 20)
    assert isinstance(plan, Plan) and len(plan.tasks) == 1
    merger = CountMerger()
    ingested = ingest(ctx, plan, merger)
    assert [m.documents for m in ingested.parts] == [len(DOCS)]
    assert load_part_meta(str(ctx.cache), plan.tasks[0].key) == ingested.parts[0]
    kept = assign(ctx, plan, ingested, tmp_path / "stage")
    counts, train_documents = count(ctx, plan, ingested, kept, merger)
    assert train_documents == len(DOCS)
    want = collections.Counter(w for d in DOCS for w in d.split())
    assert counts.column("key").to_pylist() == [w.encode() for w in want]  # Counter keeps first-seen order
    assert counts.column("count").to_pylist() == list(want.values())
    stage = tmp_path / "stage"
    stage.mkdir()
    fitted = fit(recipe, counts, stage)
    totals = encode(ctx, plan, kept, fitted, stage)
    assert totals[0]["train"]["documents"] == len(DOCS)
    ids = read_encoded(str(encoded_path(str(stage), 0, "train")))
    release_encoded(str(stage))  # no shard phase here to release what encode held
    vocab = Vocabulary.load(stage / "vocab.arrow")
    end = vocab.id_of("end")
    assert int(np.count_nonzero(ids == end)) == len(DOCS)  # one end marker per document
    assert b" ".join(vocab.tokens_for(ids)) == " ".join(DOCS).encode()


def test_fresh_parts_are_counted_at_ingest_and_cached_ones_in_the_count_phase(tmp_path: Path) -> None:
    """Without dedupe a fresh part arrives counted (nothing to recount); a part reused from the
    cache is counted again; with a dedupe step every part is counted after duplicates are known."""
    recipe = tiny_recipe(tmp_path)
    ctx = context(recipe, tmp_path)
    plan = plan_build(recipe, ctx.cache, part_bytes=1 << 20)
    first = ingest(ctx, plan, CountMerger())
    assert (first.reused, first.recount) == (0, ())
    again = ingest(ctx, plan, CountMerger())
    assert (again.reused, again.recount) == (1, (0,))
    deduped = tiny_recipe(tmp_path / "dedupe", '[[clean]]\nkind = "dedupe"')
    ctx_d = context(deduped, tmp_path / "dedupe")
    plan_d = plan_build(deduped, ctx_d.cache, part_bytes=1 << 20)
    assert ingest(ctx_d, plan_d, CountMerger()).recount == (0,)


def key_of(recipe: Recipe, root: Path, file_hash: str = "f" * 32) -> str:
    """The cache key of the first part of the tiny corpus's file under ``recipe``."""
    part = recipe.sources[0].plan(root / "logs" / "day-1.txt", 1 << 20)[0]
    return part_key(recipe, 0, [(file_hash, part)])


def test_part_keys_change_when_the_cleaning_changes(tmp_path: Path) -> None:
    """Another cleaning step, or another file hash, gives the part another cache key."""
    recipe = tiny_recipe(tmp_path)
    lowercase = parse_recipe(RECIPE.format(clean='[[clean]]\nkind = "lowercase"'), tmp_path)
    assert key_of(lowercase, tmp_path) != key_of(recipe, tmp_path)
    assert key_of(recipe, tmp_path, "e" * 32) != key_of(recipe, tmp_path)


@pytest.mark.parametrize("vocab", [VocabSpec(min_count=2), VocabSpec(cap=8)])
def test_part_keys_stay_when_only_the_vocabulary_changes(tmp_path: Path, vocab: VocabSpec) -> None:
    """A vocabulary setting is not part of the key: a rebuild with it reuses every part."""
    recipe = tiny_recipe(tmp_path)
    changed = recipe.replace(vocabulary=vocab)
    assert changed.fingerprint != recipe.fingerprint
    assert key_of(changed, tmp_path) == key_of(recipe, tmp_path)


@pytest.mark.parametrize("count_ids", [None, 12])
def test_shard_task_counts_its_ids_fresh_and_when_kept(
    tmp_path: Path, count_ids: int | None, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A shard task with ``count_ids`` returns np.bincount of exactly the ids it wrote (also when it
    keeps a shard an interrupted run left, and counted in slices), and no counts without it."""
    from seqpipe.ingest import ShardTask, write_shard_task
    from seqpipe.shards import write_shard

    monkeypatch.setattr("seqpipe.ingest.COUNT_SLICE", 4)  # the 6 ids in two slices, the last one short

    a, b = tmp_path / "a.arrow", tmp_path / "b.arrow"
    write_shard(a, np.array([1, 2, 2, 7, 3], np.uint16))
    write_shard(b, np.array([7, 7, 0, 11], np.uint16))
    task = ShardTask(str(tmp_path / "s.arrow"), ((str(a), 1, 4), (str(b), 0, 3)), None, "uint16", count_ids)
    fresh, kept = write_shard_task(task), write_shard_task(task)
    assert (fresh["reused"], kept["reused"]) == (False, True)
    for result in (fresh, kept):
        if count_ids is None:
            assert "id_counts" not in result
        else:
            want = np.bincount(np.array([2, 2, 7, 7, 7, 0]), minlength=count_ids)
            assert result["id_counts"].tolist() == want.tolist()
