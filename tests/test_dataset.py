"""Opening a built dataset (seqpipe/dataset.py): its splits, their token streams and documents
agree with the manifest, and a missing split or a broken manifest is refused with our errors."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from conftest import build_dir, write_project

from seqpipe.dataset import Dataset, load_encoder, open_dataset
from seqpipe.errors import DatasetError, ManifestError, ShardCorruptError
from seqpipe.manifest import MANIFEST_NAME


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The conftest corpus built once for this module (read-only: tests that damage it copy it)."""
    root = tmp_path_factory.mktemp("dataset")
    return build_dir(write_project(root / "src"), root / "out")


def manifest_of(directory: Path) -> dict[str, object]:
    data: dict[str, object] = json.loads((directory / MANIFEST_NAME).read_text(encoding="utf-8"))
    return data


def copy_of(built: Path, tmp_path: Path) -> Path:
    """A private copy of the built dataset that a test may damage."""
    return Path(shutil.copytree(built, tmp_path / "copy"))


def test_splits_are_the_manifests_in_pipeline_order(built: Path) -> None:
    """open_dataset lists exactly the manifest's splits, train first, and reports its fingerprint."""
    ds = open_dataset(built)
    manifest = manifest_of(built)
    assert isinstance(ds, Dataset)
    assert set(ds.splits) == set(manifest["splits"])  # type: ignore[arg-type]
    assert ds.splits[0] == "train"
    assert ds.fingerprint == manifest["fingerprint"]


def test_token_and_document_counts_equal_the_manifest(built: Path) -> None:
    """Each split's stream holds the manifest's token count (the sum over its shards) and its
    documents table the manifest's document count; document spans tile the stream."""
    ds = open_dataset(built)
    splits = manifest_of(built)["splits"]
    assert isinstance(splits, dict)
    for name in ds.splits:
        split = ds.split(name)
        info = splits[name]
        assert len(split.stream) == split.num_tokens == info["tokens"] == sum(s["tokens"] for s in info["shards"])
        assert split.documents.num_rows == split.num_documents == info["documents"]
        starts = split.documents.column("start").to_numpy()
        lengths = split.documents.column("length").to_numpy()
        assert np.array_equal(starts[1:], (starts + lengths)[:-1])
        assert int(lengths.sum()) == split.num_tokens


def test_stream_ids_fit_the_vocabulary(built: Path) -> None:
    """Every id in every split is below the vocabulary size the manifest records."""
    ds = open_dataset(built)
    size = len(ds.vocabulary)
    for name in ds.splits:
        ids = np.concatenate([np.asarray(c) for c in ds.split(name).stream.chunks])
        assert ids.size == 0 or int(ids.max()) < size


def test_tokenizer_round_trips_corpus_words(built: Path) -> None:
    """load_encoder gives the trained encoder: decoding the ids of known words gives them back."""
    encoder = load_encoder(built)
    ids = encoder.encode("the Quill left Eastreach")
    assert encoder.decode(ids) == "the Quill left Eastreach"


def test_missing_split_is_a_dataset_error_naming_the_splits(built: Path) -> None:
    """Asking for a split the dataset lacks raises DatasetError naming the split and the ones it has."""
    ds = open_dataset(built)
    with pytest.raises(DatasetError, match=r"no split 'dev'.*'train'"):
        ds.split("dev")


def test_missing_directory_is_a_manifest_error(tmp_path: Path) -> None:
    """A directory that does not exist, or one without a manifest, is refused with ManifestError."""
    with pytest.raises(ManifestError, match="not a directory"):
        open_dataset(tmp_path / "nowhere")
    with pytest.raises(ManifestError, match="no manifest"):
        open_dataset(tmp_path)


def test_corrupt_manifest_is_a_manifest_error(built: Path, tmp_path: Path) -> None:
    """A manifest cut short is not valid JSON: open_dataset raises ManifestError naming the file."""
    copy = copy_of(built, tmp_path)
    path = copy / MANIFEST_NAME
    path.write_bytes(path.read_bytes()[:-40])
    with pytest.raises(ManifestError, match=r"manifest\.json: not valid JSON"):
        open_dataset(copy)


def test_manifest_that_contradicts_itself_is_a_manifest_error(built: Path, tmp_path: Path) -> None:
    """A manifest whose shard token counts no longer tile the split is refused by open_dataset."""
    copy = copy_of(built, tmp_path)
    manifest = manifest_of(copy)
    splits = manifest["splits"]
    assert isinstance(splits, dict)
    splits["train"]["shards"][0]["tokens"] += 1
    splits["train"]["tokens"] += 1
    (copy / MANIFEST_NAME).write_text(json.dumps(manifest), encoding="utf-8")
    with pytest.raises(ManifestError, match="tile the split"):
        open_dataset(copy)


def test_truncated_shard_is_refused_when_its_split_is_read(built: Path, tmp_path: Path) -> None:
    """Opening reads only the manifest; a shard cut short raises ShardCorruptError naming it when
    its split's stream is first read."""
    copy = copy_of(built, tmp_path)
    shard = copy / manifest_of(copy)["splits"]["train"]["shards"][0]["path"]  # type: ignore[index]
    shard.write_bytes(shard.read_bytes()[:-64])
    ds = open_dataset(copy)
    with pytest.raises(ShardCorruptError, match=shard.name):
        ds.split("train").stream  # noqa: B018 - reading the stream is the check
