"""The Store contract: every store (a local directory, a ``file://`` URI, an in-memory filesystem
behind a URI) reads, stats, hashes, lists, writes and deletes a dataset's files alike.

``StoreContract`` holds the tests; each subclass only says how to make its store and how to put
bytes in place behind the store's back, so the setup never relies on the code under test.
"""

from __future__ import annotations

import io
import os
from collections.abc import Iterator
from pathlib import Path

import pyarrow.fs as pafs
import pytest
import xxhash

from seqpipe import filesystem, storage
from seqpipe._hashing import BLOCK
from seqpipe.errors import DatasetError, ManifestError, RecipeError, ShardMissingError, UnsafePathError
from seqpipe.manifest import MANIFEST_NAME
from seqpipe.storage import FileStat, LocalStore, Store, UriStore, open_store

# pyarrow's in-memory filesystem for its own tests (pyarrow._fs._MockFileSystem in the installed pyarrow)
MockFileSystem = getattr(pytest.importorskip("pyarrow._fs"), "_MockFileSystem", None)

MEM = "memstore://bucket"  # a scheme pyarrow does not know: only the registration below serves it


class StoreContract:
    """Tests every Store passes."""

    @pytest.fixture
    def store(self) -> Store:
        raise NotImplementedError

    def put(self, store: Store, rel: str, data: bytes) -> None:
        """Place ``data`` at ``rel`` without going through ``store`` (parent folders made)."""
        raise NotImplementedError

    def make_dir(self, store: Store, rel: str) -> None:
        """Make an empty folder ``rel`` without going through ``store``."""
        raise NotImplementedError

    # -- the manifest -------------------------------------------------------------------------
    def test_read_manifest_returns_its_exact_bytes(self, store: Store) -> None:
        """read_manifest gives the manifest file's bytes unchanged."""
        raw = b'{\n  "format": "x"\n}\n'
        self.put(store, MANIFEST_NAME, raw)
        assert store.read_manifest() == raw

    def test_missing_manifest_is_a_manifest_error(self, store: Store) -> None:
        """A store without a manifest raises ManifestError saying there is none."""
        self.put(store, "shards/a.arrow", b"x")
        with pytest.raises(ManifestError, match="no manifest"):
            store.read_manifest()

    def test_oversized_manifest_is_refused(self, store: Store, monkeypatch: pytest.MonkeyPatch) -> None:
        """A manifest over the size limit raises ManifestError naming the limit."""
        monkeypatch.setattr(storage, "MAX_MANIFEST_BYTES", 16)
        self.put(store, MANIFEST_NAME, b"x" * 17)
        with pytest.raises(ManifestError, match="16-byte limit"):
            store.read_manifest()
        self.put(store, MANIFEST_NAME, b"x" * 16)
        assert store.read_manifest() == b"x" * 16

    # -- stat, open, hash ---------------------------------------------------------------------
    def test_stat_of_a_file_a_folder_and_nothing(self, store: Store) -> None:
        """stat gives a file's size, says a folder is no file, and None where nothing is."""
        self.put(store, "docs/train.arrow", b"12345")
        self.put(store, "empty.bin", b"")
        assert store.stat("docs/train.arrow") == FileStat(5, True, False)
        assert store.stat("empty.bin") == FileStat(0, True, False)
        folder = store.stat("docs")
        assert folder is not None and not folder.is_file
        assert store.stat("docs/nothing.arrow") is None
        assert store.stat("docs/train.arrow/below") is None  # a file's name used as a folder

    @pytest.mark.parametrize("size", [0, 1, 1000, BLOCK + 5], ids=["empty", "one", "small", "over-a-block"])
    def test_hash_is_xxh3_128_of_the_bytes(self, store: Store, size: int) -> None:
        """hash equals XXH3-128 of the file's bytes as computed by the xxhash library itself."""
        data = bytes((i * 7 + 3) % 251 for i in range(min(size, 4096))) * (size // 4096 + 1)
        data = data[:size]
        self.put(store, "shards/train/000000.arrow", data)
        assert store.hash("shards/train/000000.arrow") == xxhash.xxh3_128(data).hexdigest()

    def test_open_reads_the_bytes_from_the_start(self, store: Store) -> None:
        """open gives a stream of the file's bytes as stored."""
        self.put(store, "vocab.arrow", b"ferry logbook")
        with store.open("vocab.arrow") as stream:
            assert stream.read(5) == b"ferry"
            assert stream.read(100) == b" logbook"

    @pytest.mark.parametrize("call", ["open", "hash", "delete"])
    def test_missing_file_is_shard_missing_error(self, store: Store, call: str) -> None:
        """open, hash and delete of a file that is not there raise ShardMissingError naming it."""
        self.put(store, "shards/a.arrow", b"x")
        with pytest.raises(ShardMissingError, match=r"shards/b\.arrow") as info:
            getattr(store, call)("shards/b.arrow")
        assert isinstance(info.value, FileNotFoundError) and isinstance(info.value, DatasetError)

    def test_hash_of_a_folder_is_a_dataset_error(self, store: Store) -> None:
        """Hashing a folder raises one of our errors naming it, never a bare OSError."""
        self.put(store, "shards/train/a.arrow", b"x")
        with pytest.raises(DatasetError, match="shards/train"):
            store.hash("shards/train")

    # -- listing ------------------------------------------------------------------------------
    def test_list_files_is_recursive_sorted_and_relative(self, store: Store) -> None:
        """list_files gives every file below a folder (nested ones too) relative to the root, sorted;
        empty folders add nothing."""
        for rel in ["shards/validation/000000.arrow", "shards/train/000001.arrow", "shards/train/000000.arrow"]:
            self.put(store, rel, b"x")
        self.put(store, "docs/train.arrow", b"y")
        self.put(store, MANIFEST_NAME, b"{}")
        self.make_dir(store, "shards/empty")
        self.make_dir(store, "shards/deep/er")
        assert store.list_files("shards") == [
            "shards/train/000000.arrow",
            "shards/train/000001.arrow",
            "shards/validation/000000.arrow",
        ]
        assert store.list_files("shards/train") == ["shards/train/000000.arrow", "shards/train/000001.arrow"]
        assert store.list_files() == [
            "docs/train.arrow",
            MANIFEST_NAME,
            "shards/train/000000.arrow",
            "shards/train/000001.arrow",
            "shards/validation/000000.arrow",
        ]

    def test_list_of_what_is_no_folder_is_empty(self, store: Store) -> None:
        """Listing a missing path, an empty folder or a file gives nothing, not an error."""
        self.put(store, "docs/train.arrow", b"y")
        self.make_dir(store, "shards")
        for rel in ["nothing", "shards", "docs/train.arrow"]:
            assert store.list_files(rel) == [], rel
            assert store.list_dir(rel) == [], rel

    def test_list_dir_names_files_and_folders_directly_inside(self, store: Store) -> None:
        """list_dir gives the names directly inside a folder, files and folders alike, sorted."""
        self.put(store, "shards/train/000000.arrow", b"x")
        self.put(store, MANIFEST_NAME, b"{}")
        self.make_dir(store, "notes")
        assert store.list_dir() == [MANIFEST_NAME, "notes", "shards"]
        assert store.list_dir("shards") == ["train"]

    # -- writing and deleting -----------------------------------------------------------------
    def test_write_then_read_back(self, store: Store) -> None:
        """write stores the stream's bytes (folders made as needed), returns their count, and
        replaces what was there; write_bytes does the same from bytes."""
        data = b"0123456789" * 1000
        assert store.write("shards/train/000000.arrow", io.BytesIO(data)) == len(data)
        assert store.stat("shards/train/000000.arrow") == FileStat(len(data), True, False)
        assert store.hash("shards/train/000000.arrow") == xxhash.xxh3_128(data).hexdigest()
        store.write_bytes("shards/train/000000.arrow", b"short")
        with store.open("shards/train/000000.arrow") as stream:
            assert stream.read() == b"short"
        store.write_bytes(MANIFEST_NAME, b"{}")
        assert store.read_manifest() == b"{}"
        assert store.list_files() == [MANIFEST_NAME, "shards/train/000000.arrow"]  # no temporary left

    def test_write_of_an_empty_stream(self, store: Store) -> None:
        """An empty source makes an empty file."""
        assert store.write("tokenizer.arrow", io.BytesIO(b"")) == 0
        assert store.stat("tokenizer.arrow") == FileStat(0, True, False)

    def test_delete_removes_a_file_and_missing_ok_allows_none(self, store: Store) -> None:
        """delete removes the file (its siblings stay); with missing_ok a missing one is no error."""
        self.put(store, "shards/a.arrow", b"a")
        self.put(store, "shards/b.arrow", b"b")
        store.delete("shards/a.arrow")
        assert store.stat("shards/a.arrow") is None
        assert store.list_files("shards") == ["shards/b.arrow"]
        store.delete("shards/a.arrow", missing_ok=True)

    # -- paths --------------------------------------------------------------------------------
    @pytest.mark.parametrize("hostile", ["../x", "shards/../../x", "/etc/passwd", "shards\\x", "a:b", "a\x00b", ""])
    def test_check_path_refuses_paths_leaving_the_store(self, store: Store, hostile: str) -> None:
        """check_path raises UnsafePathError for absolute paths, '..', backslashes, colons, NUL, ''."""
        with pytest.raises(UnsafePathError):
            store.check_path(hostile)

    def test_check_path_accepts_a_relative_path(self, store: Store) -> None:
        """A plain relative path passes, whether or not a file is there yet."""
        self.put(store, "shards/train/000000.arrow", b"x")
        store.check_path("shards/train/000000.arrow")
        store.check_path("shards/validation/000009.arrow")

    def test_where_names_the_file_under_the_location(self, store: Store) -> None:
        """Messages name a file as the store's location plus its relative path."""
        assert store.where("shards/a.arrow") == store.location + "/shards/a.arrow"
        assert store.where("") == store.location


class TestLocalStore(StoreContract):
    """A dataset in a local directory."""

    @pytest.fixture
    def store(self, tmp_path: Path) -> Store:
        (tmp_path / "ds").mkdir()
        return LocalStore(tmp_path / "ds")

    def put(self, store: Store, rel: str, data: bytes) -> None:
        path = Path(store.location, rel)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)

    def make_dir(self, store: Store, rel: str) -> None:
        Path(store.location, rel).mkdir(parents=True, exist_ok=True)

    def test_symlinks_are_reported_and_followed(self, store: Store, tmp_path: Path) -> None:
        """stat says a name is a symlink and gives its target's size; a dangling link is no file."""
        self.put(store, "shards/real.arrow", b"abc")
        os.symlink("real.arrow", Path(store.location, "shards/link.arrow"))
        os.symlink(tmp_path / "gone", Path(store.location, "shards/dangling.arrow"))
        assert store.stat("shards/link.arrow") == FileStat(3, True, True)
        assert store.stat("shards/dangling.arrow") == FileStat(0, False, True)

    def test_check_path_refuses_symlinks_leading_outside(self, store: Store, tmp_path: Path) -> None:
        """A symlink leading out of the directory is refused; one staying inside is accepted."""
        (tmp_path / "outside").mkdir()
        (tmp_path / "outside" / "a.arrow").write_bytes(b"x")
        self.make_dir(store, "shards")
        os.symlink(tmp_path / "outside", Path(store.location, "shards/train"), target_is_directory=True)
        os.symlink(Path(store.location, "shards"), Path(store.location, "inner"), target_is_directory=True)
        with pytest.raises(UnsafePathError, match="outside"):
            store.check_path("shards/train/a.arrow")
        store.check_path("inner/b.arrow")  # resolves to shards/b.arrow, inside

    def test_list_files_does_not_descend_into_symlinked_folders(self, store: Store, tmp_path: Path) -> None:
        """A symlinked folder below the listed one is not walked (its files may lie anywhere)."""
        (tmp_path / "outside").mkdir()
        (tmp_path / "outside" / "a.arrow").write_bytes(b"x")
        self.put(store, "shards/b.arrow", b"y")
        os.symlink(tmp_path / "outside", Path(store.location, "shards/train"), target_is_directory=True)
        assert store.list_files("shards") == ["shards/b.arrow"]

    def test_failed_write_keeps_the_old_file_and_leaves_no_temporary(self, store: Store) -> None:
        """A write whose source fails midway leaves the old bytes in place and no temporary file."""

        class Broken(io.RawIOBase):
            def read(self, size: int = -1) -> bytes:
                raise OSError("source went away")

        self.put(store, "vocab.arrow", b"old")
        with pytest.raises(DatasetError, match=r"vocab\.arrow"):
            store.write("vocab.arrow", Broken())
        assert Path(store.location, "vocab.arrow").read_bytes() == b"old"
        assert os.listdir(store.location) == ["vocab.arrow"]

    def test_not_a_directory_is_a_manifest_error(self, tmp_path: Path) -> None:
        """A local store whose directory does not exist says so when its manifest is read."""
        with pytest.raises(ManifestError, match="not a directory"):
            LocalStore(tmp_path / "nothing").read_manifest()


class TestFileUriStore(StoreContract):
    """A dataset behind a ``file://`` URI (pyarrow's local filesystem)."""

    @pytest.fixture
    def store(self, tmp_path: Path) -> Store:
        (tmp_path / "ds").mkdir()
        return UriStore("file://" + (tmp_path / "ds").resolve().as_posix())

    def put(self, store: Store, rel: str, data: bytes) -> None:
        path = Path("/", filesystem.parse_uri(store.location).path, rel)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)

    def make_dir(self, store: Store, rel: str) -> None:
        Path("/", filesystem.parse_uri(store.location).path, rel).mkdir(parents=True, exist_ok=True)


@pytest.mark.skipif(MockFileSystem is None, reason="this pyarrow has no _MockFileSystem")
class TestMemoryUriStore(StoreContract):
    """A dataset behind a made-up scheme served by pyarrow's in-memory filesystem."""

    @pytest.fixture
    def mem(self) -> Iterator[pafs.FileSystem]:
        fs = MockFileSystem()
        filesystem.register_filesystem(MEM, fs)
        yield fs
        filesystem.clear_filesystems()

    @pytest.fixture
    def store(self, mem: pafs.FileSystem) -> Store:
        return UriStore(MEM + "/sets/ds")

    def put(self, store: Store, rel: str, data: bytes) -> None:
        assert isinstance(store, UriStore)
        inner = store.inner(rel)
        store.filesystem.create_dir(inner.rpartition("/")[0], recursive=True)
        with store.filesystem.open_output_stream(inner) as sink:
            sink.write(data)

    def make_dir(self, store: Store, rel: str) -> None:
        assert isinstance(store, UriStore)
        store.filesystem.create_dir(store.inner(rel), recursive=True)

    def test_a_write_the_filesystem_reports_short_is_refused(
        self, store: Store, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """After an upload the store checks the size the filesystem reports (no rename to trust)."""
        monkeypatch.setattr(UriStore, "stat", lambda self, rel: FileStat(2, True))
        with pytest.raises(DatasetError, match="wrote 5 bytes, the filesystem reports 2 bytes"):
            store.write_bytes("shards/a.arrow", b"12345")

    def test_location_is_the_normalized_uri(self, mem: pafs.FileSystem) -> None:
        """The location keeps scheme and authority and drops surplus slashes."""
        assert UriStore(MEM + "//sets/ds/").location == MEM + "/sets/ds"
        assert UriStore(MEM).location == MEM


def test_open_store_picks_the_store_by_location(tmp_path: Path) -> None:
    """A plain path or Path opens a LocalStore, a URI a UriStore, and a Store is passed through."""
    local = open_store(tmp_path)
    assert isinstance(local, LocalStore) and local.location == str(tmp_path)
    assert isinstance(open_store(str(tmp_path)), LocalStore)
    uri = open_store("file://" + tmp_path.as_posix())
    assert isinstance(uri, UriStore) and uri.location == "file://" + tmp_path.as_posix()
    assert open_store(local) is local


def test_unknown_scheme_is_a_recipe_error_naming_the_key() -> None:
    """A URI pyarrow cannot use raises RecipeError naming the argument it came from."""
    with pytest.raises(RecipeError, match="nosuchscheme") as info:
        open_store("nosuchscheme://bucket/ds", key="out")
    assert info.value.key == "out"
