"""The partitioned drop phases remove the same documents, and the build writes the same bytes,
with 1 worker, 2 workers and a local Dask cluster."""

from __future__ import annotations

import random
from pathlib import Path
from typing import Any

import pytest
from test_scale import dataset_files

from seqpipe import _dedupe, build
from seqpipe.recipe import Recipe, parse_recipe

SOURCES = """
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "paragraph"

[[sources]]
kind = "text"
paths = "held/*.txt"
document = "paragraph"
fixed_split = "validation"
"""
# equal content means an equal dedupe key, so a dedupe step would drop a held-out copy (or
# the train one) before the overlap check: each recipe exercises one kind of removal
STEPS = {
    "dedupe": """
[[clean]]
kind = "dedupe"

[[clean]]
kind = "near_dedupe"
shingle = 2
bands = 8
rows = 2
threshold = 0.6
""",
    "overlap": "",
}
REST = """
[tokenizer]
kind = "words"

[splits]
train = 0.8
validation = 0.1
test = 0.1
exclude_overlap_from_train = true

[shards]
tokens = 2000
"""


def write_corpus(root: Path) -> None:
    """Ferry logbook entries over several files, with exact copies, copies with a word or two
    changed (in other files, so in other parts), and a held-out file sharing some entries."""
    rng = random.Random(5)
    words = [f"{a}{b}" for a in ("tide", "oar", "pier", "rope", "deck", "gull") for b in ("s", "ing", "er", "ed", "")]
    entries = [[rng.choice(words) for _ in range(rng.randint(6, 30))] for _ in range(400)]
    out: list[list[str]] = [[] for _ in range(5)]
    for i, entry in enumerate(entries):
        out[i % 5].append(" ".join(entry))
        if i % 7 == 0:  # an exact copy in another file
            out[(i + 2) % 5].append(" ".join(entry))
        if i % 5 == 1:  # a near-copy: one or two words changed
            copy = list(entry)
            for _ in range(rng.randint(1, 2)):
                copy[rng.randrange(len(copy))] = "ferry"
            out[(i + 3) % 5].append(" ".join(copy))
    (root / "corpus").mkdir(parents=True)
    for f, paras in enumerate(out):
        (root / "corpus" / f"log-{f}.txt").write_text("\n\n".join(paras) + "\n", encoding="utf-8")
    (root / "held").mkdir()
    held = [" ".join(entries[i]) for i in range(0, 400, 11)]
    (root / "held" / "check.txt").write_text("\n\n".join(held) + "\n", encoding="utf-8")


@pytest.fixture(scope="module")
def root(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("dedupe-determinism")
    write_corpus(root)
    return root


@pytest.fixture(scope="module", params=sorted(STEPS))
def corpus(root: Path, request: pytest.FixtureRequest) -> Recipe:
    return parse_recipe(SOURCES + STEPS[request.param] + REST, root)


def removed(manifest: dict[str, Any]) -> tuple[int, int, int, int]:
    summary = manifest["summary"]
    overlap = summary["train_overlap"]
    return (
        summary["duplicates_dropped"],
        summary["near_duplicates_dropped"],
        overlap["documents"],
        overlap["removed"],
    )


@pytest.fixture(scope="module")
def reference(corpus: Recipe, tmp_path_factory: pytest.TempPathFactory) -> tuple[dict[str, Any], dict[str, bytes]]:
    """The build with one worker, many parts and several partitions per phase."""
    out = tmp_path_factory.mktemp("one") / "out"
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(_dedupe, "ROWS_PER_PARTITION", 200)  # the driver picks the count; tasks get it
        result = build(corpus, out, workers=1, progress=False, part_bytes=2048)
    return result.manifest, dataset_files(out)


def test_one_worker_removes_every_kind(corpus: Recipe, reference: tuple[dict[str, Any], dict[str, bytes]]) -> None:
    """The corpora exercise exact, near and held-out removal (so the comparisons below mean something)."""
    duplicates, near, overlap, overlap_removed = removed(reference[0])
    if any(step.kind == "dedupe" for step in corpus.clean):
        assert duplicates > 0 and near > 0
    else:
        assert overlap > 0 and overlap_removed == overlap


def test_two_workers_remove_the_same_documents(
    corpus: Recipe, reference: tuple[dict[str, Any], dict[str, bytes]], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """workers=2 (this process and a spawned one) writes the bytes of workers=1."""
    monkeypatch.setattr(_dedupe, "ROWS_PER_PARTITION", 200)
    result = build(corpus, tmp_path / "out", workers=2, progress=False, part_bytes=2048)
    assert removed(result.manifest) == removed(reference[0])
    assert dataset_files(tmp_path / "out") == reference[1]


def test_a_dask_cluster_removes_the_same_documents(
    corpus: Recipe, reference: tuple[dict[str, Any], dict[str, bytes]], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A local Dask cluster of two worker processes writes the bytes of workers=1."""
    distributed = pytest.importorskip("distributed")
    from seqpipe.dask_support import executor_for_client

    monkeypatch.setattr(_dedupe, "ROWS_PER_PARTITION", 200)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0")
    with cluster, distributed.Client(cluster) as client:
        result = build(corpus, tmp_path / "out", executor=executor_for_client(client), progress=False, part_bytes=2048)
    assert removed(result.manifest) == removed(reference[0])
    assert dataset_files(tmp_path / "out") == reference[1]
