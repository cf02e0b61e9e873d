"""Sources named by filesystem URIs read the same bytes and build the same dataset as local globs.

Every build here is compared with a build of the same files through a relative glob: the
vocabulary hash, every shard's token and file hash, the docs tables and the read counts must
match. The filesystems are pyarrow's local one (``file://``) and its in-memory mock behind a
made-up scheme (no network here).
"""

from __future__ import annotations

import gzip
import json
import random
import re
from collections.abc import Callable, Iterator
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq
import pytest

from seqpipe import BuildResult, build, filesystem
from seqpipe import _build as build_module
from seqpipe._hashing import hash_file
from seqpipe.errors import RecipeError, SourceError, SourceMissingError
from seqpipe.executors import InlineExecutor
from seqpipe.recipe import parse_recipe
from seqpipe.sources import TextSource
from seqpipe.sources.base import glob_base

# pyarrow ships an in-memory filesystem for its own tests as pyarrow._fs._MockFileSystem (found in
# the installed pyarrow; its docstring reads "_MockFileSystem(datetime current_time=None)").
MockFileSystem = getattr(pytest.importorskip("pyarrow._fs"), "_MockFileSystem", None)
needs_mock = pytest.mark.skipif(MockFileSystem is None, reason="this pyarrow has no _MockFileSystem")

WORDS = (
    "ferry",
    "tide",
    "dock",
    "cargo",
    "lantern",
    "rope",
    "harbour",
    "fog",
    "north",
    "south",
    "calm",
    "squall",
    "pilot",
    "ledger",
    "gull",
    "buoy",
    "keel",
    "oar",
)

MEM = "memtest://bucket"  # a scheme pyarrow does not know: only our registration serves it

KINDS: dict[str, tuple[str, str]] = {  # kind -> (glob under the corpus root, extra recipe keys)
    "text": ("data/text/**/*.txt", 'document = "paragraph"'),
    "jsonl": ("data/jsonl/*.jsonl*", 'field = "text"'),
    "parquet": ("data/parquet/*.parquet", 'field = "text"'),
    "arrow": ("data/arrow/*.arrow", 'field = "text"'),
}

RECIPE = """
[[sources]]
kind = "{kind}"
paths = "{paths}"
{extra}
[tokenizer]
kind = "words"
[shards]
tokens = 250
"""


def _docs(seed: int, n: int) -> list[str]:
    """Invented sentences from a seeded generator (demo data, not a reference)."""
    rnd = random.Random(seed)
    return [" ".join(rnd.choice(WORDS) for _ in range(rnd.randint(4, 24))).capitalize() + "." for _ in range(n)]


def _write_arrow(path: Path, docs: list[str]) -> None:
    table = pa.table({"id": pa.array(range(len(docs)), pa.int64()), "text": pa.array(docs, pa.string())})
    with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        for batch in table.to_batches(max_chunksize=25):
            writer.write_batch(batch)


def write_corpus(root: Path) -> Path:
    """Files of every kind under ``root/data``, several parts each at ``PART_BYTES``."""
    data = root / "data"
    for sub in ("text/sub", "jsonl", "parquet", "arrow"):
        (data / sub).mkdir(parents=True, exist_ok=True)
    (data / "text" / "a.txt").write_text("\n\n".join(_docs(1, 120)) + "\n", encoding="utf-8")
    (data / "text" / "sub" / "b.txt").write_text("\r\n\r\n".join(_docs(2, 80)) + "\r\n", encoding="utf-8")
    (data / "jsonl" / "a.jsonl").write_text(
        "".join(json.dumps({"text": d}) + "\n" for d in _docs(3, 150)), encoding="utf-8"
    )
    raw = "".join(json.dumps({"text": d, "n": i}) + "\n" for i, d in enumerate(_docs(4, 60))).encode()
    # mtime=0 keeps the gzip bytes fixed (Python's gzip module docs)
    (data / "jsonl" / "b.jsonl.gz").write_bytes(gzip.compress(raw, mtime=0))
    for name, seed in (("a", 5), ("b", 6)):
        docs = _docs(seed, 100)
        pq.write_table(pa.table({"text": docs}), data / "parquet" / f"{name}.parquet", row_group_size=20)
        _write_arrow(data / "arrow" / f"{name}.arrow", _docs(seed + 10, 90))
    return root


PART_BYTES = 2048  # small parts: text and JSON Lines files are cut (and read with seeks)


def build_glob(root: Path, kind: str, paths: str, out: Path, **kwargs: Any) -> BuildResult:
    glob, extra = KINDS[kind]
    text = RECIPE.format(kind=kind, paths=paths or glob, extra=extra)
    return build(parse_recipe(text, root), out, progress=False, part_bytes=PART_BYTES, **kwargs)


def outputs(result: BuildResult) -> dict[str, Any]:
    """What must not depend on where the inputs were read from."""
    m = result.manifest
    return {
        "vocabulary": m["vocabulary"]["hash"],
        "tokenizer": [f["hash"] for f in m["tokenizer"]["files"]],
        "splits": {
            name: {
                "documents": sp["documents"],
                "tokens": sp["tokens"],
                "document_table": sp["document_table"]["hash"],
                "shards": [(s["token_hash"], s["hash"]) for s in sp["shards"]],
            }
            for name, sp in m["splits"].items()
        },
        "inputs": [(i["bytes"], i["hash"]) for i in m["inputs"]],
        "read": m["summary"]["read"],
    }


def file_uri(path: Path) -> str:
    """A ``file://`` URI as seqpipe takes it: the absolute path written after the scheme."""
    return "file://" + path.resolve().as_posix()


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_corpus(tmp_path_factory.mktemp("corpus"))


@pytest.fixture(scope="module")
def local_builds(corpus: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, BuildResult]:
    """Each kind built once from its relative glob: the reference for every other build."""
    out = tmp_path_factory.mktemp("local")
    return {kind: build_glob(corpus, kind, "", out / kind) for kind in KINDS}


@pytest.fixture
def memfs(corpus: Path) -> Iterator[Any]:
    """The corpus copied into an in-memory filesystem served as ``memtest://bucket/...``."""
    mem = MockFileSystem()
    for path in sorted(corpus.rglob("*")):
        if path.is_file():
            inner = "bucket/" + path.relative_to(corpus).as_posix()
            mem.create_dir(inner.rsplit("/", 1)[0])
            # compression=None: by default pyarrow compresses what it writes to a name ending in .gz
            # (FileSystem.open_output_stream, from the installed pyarrow's docstrings)
            with mem.open_output_stream(inner, compression=None) as sink:
                sink.write(path.read_bytes())
    filesystem.register_filesystem(MEM, mem, root="bucket")
    try:
        yield mem
    finally:
        filesystem.clear_filesystems()


# -- (a) file:// URIs, in this process -------------------------------------------------------------


@pytest.mark.parametrize("kind", list(KINDS))
def test_file_uris_build_the_same_dataset(
    kind: str, corpus: Path, local_builds: dict[str, BuildResult], tmp_path: Path
) -> None:
    local = local_builds[kind]
    remote = build_glob(corpus, kind, file_uri(corpus) + "/" + KINDS[kind][0], tmp_path / "out")
    assert outputs(remote) == outputs(local)
    # the comparison means something: several shards, and the larger files were cut into parts
    assert sum(len(sp["shards"]) for sp in local.manifest["splits"].values()) > 2
    assert local.parts_total > len(local.manifest["inputs"])
    assert remote.parts_total == local.parts_total
    # the manifest records the URI of each input, the local build the path under its glob's fixed directory
    base = corpus / glob_base(KINDS[kind][0])
    assert [i["path"] for i in remote.manifest["inputs"]] == [
        file_uri(base / i["path"]) for i in local.manifest["inputs"]
    ]


# -- (b) file:// URIs read by spawned worker processes --------------------------------------------


def test_file_uris_with_two_worker_processes(
    corpus: Path, local_builds: dict[str, BuildResult], tmp_path: Path
) -> None:
    remote = build_glob(corpus, "jsonl", file_uri(corpus) + "/" + KINDS["jsonl"][0], tmp_path / "out", workers=2)
    assert outputs(remote) == outputs(local_builds["jsonl"])


# -- (c) a filesystem that is not the local disk ---------------------------------------------------


@needs_mock
@pytest.mark.parametrize("kind", list(KINDS))
def test_in_memory_filesystem_builds_the_same_dataset(
    kind: str, corpus: Path, memfs: Any, local_builds: dict[str, BuildResult], tmp_path: Path
) -> None:
    remote = build_glob(corpus, kind, f"{MEM}/{KINDS[kind][0]}", tmp_path / "out")  # default executor
    assert outputs(remote) == outputs(local_builds[kind])
    local_paths = [i["path"] for i in local_builds[kind].manifest["inputs"]]
    base = glob_base(KINDS[kind][0])
    assert [i["path"] for i in remote.manifest["inputs"]] == [f"{MEM}/{base}/{p}" for p in local_paths]


def _count_uri_hashes(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Record every URI the build hashes (_build.py calls the hash_file it imported)."""
    seen: list[str] = []

    def counting(path: Any, *args: Any, **kwargs: Any) -> str:
        if filesystem.is_uri(path):
            seen.append(str(path))
        return hash_file(path, *args, **kwargs)

    monkeypatch.setattr(build_module, "hash_file", counting)
    return seen


@needs_mock
def test_unchanged_uris_are_not_hashed_again(
    corpus: Path, memfs: Any, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    hashed = _count_uri_hashes(monkeypatch)
    first = build_glob(corpus, "text", f"{MEM}/data/text/**/*.txt", tmp_path / "out")
    assert len(hashed) == len(first.manifest["inputs"]) == 2
    hashed.clear()
    again = build_glob(corpus, "text", f"{MEM}/data/text/**/*.txt", tmp_path / "out")
    assert hashed == []  # size and mtime unchanged: the stored hashes are reused
    assert again.parts_reused == again.parts_total
    # new bytes of another size (the mock stamps every file with the time it was made)
    with memfs.open_output_stream("bucket/data/text/a.txt") as sink:
        sink.write(b"A new first document about the ferry.\n\nAnd a second one.\n")
    changed = build_glob(corpus, "text", f"{MEM}/data/text/**/*.txt", tmp_path / "out")
    assert hashed == [f"{MEM}/data/text/a.txt"]
    assert changed.manifest["inputs"][0]["hash"] != first.manifest["inputs"][0]["hash"]


class _Wrapped(pafs.FileSystemHandler):
    """A filesystem in Python over another one, reporting no mtime, or failing on every stat.

    The handler methods are those pyarrow.fs.FileSystemHandler declares (from the installed
    pyarrow's docstrings); only reading is needed here.
    """

    def __init__(self, inner: Any, *, broken: bool = False) -> None:
        self.inner = inner
        self.broken = broken

    def _strip(self, infos: list[Any]) -> list[Any]:
        if self.broken:
            raise OSError("connection refused (simulated)")
        return [pafs.FileInfo(i.path, i.type, size=i.size) for i in infos]

    def get_type_name(self) -> str:
        return "wrapped"

    def normalize_path(self, path: str) -> str:
        return path

    def get_file_info(self, paths: list[str]) -> list[Any]:
        return self._strip(self.inner.get_file_info(paths))

    def get_file_info_selector(self, selector: Any) -> list[Any]:
        return self._strip(self.inner.get_file_info(selector))

    def open_input_file(self, path: str) -> Any:
        return self.inner.open_input_file(path)

    def open_input_stream(self, path: str) -> Any:
        return self.inner.open_input_stream(path, compression=None)

    def _read_only(self, *args: Any) -> Any:
        raise NotImplementedError("read-only test filesystem")

    create_dir = delete_dir = delete_dir_contents = delete_root_dir_contents = delete_file = _read_only
    move = copy_file = open_output_stream = open_append_stream = _read_only


@needs_mock
def test_a_filesystem_without_mtime_is_hashed_every_build(
    corpus: Path, memfs: Any, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, local_builds: dict[str, BuildResult]
) -> None:
    filesystem.register_filesystem("nomtime://bucket", pafs.PyFileSystem(_Wrapped(memfs)), root="bucket")
    assert filesystem.change_stamp("nomtime://bucket/data/text/a.txt") is None
    assert filesystem.change_stamp(f"{MEM}/data/text/a.txt") is not None
    hashed = _count_uri_hashes(monkeypatch)
    for _ in range(2):
        hashed.clear()
        result = build_glob(corpus, "text", "nomtime://bucket/data/text/**/*.txt", tmp_path / "out")
        assert len(hashed) == 2  # no stamp to trust: every build hashes each input again
        assert outputs(result) == outputs(local_builds["text"])


# -- globs -----------------------------------------------------------------------------------------

GLOB_TREE = (
    "g/a.txt",
    "g/b.txt",
    "g/c.md",
    "g/.h.txt",
    "g/sub/d.txt",
    "g/sub/deep/e.txt",
    "g/.hid/f.txt",
    "g/sub/.x/g.txt",
    "g/x[1].txt",
)
GLOB_PATTERNS = (
    "g/*.txt",
    "g/**/*.txt",
    "g/**",
    "g/*/*.txt",
    "g/[ab].txt",
    "g/?.txt",
    "g/.*.txt",
    "g/.hid/*.txt",
    "g/**/deep/*.txt",
    "g/sub/d.txt",
    "**/e.txt",
    "g/x[[]1].txt",
    "g/*/",
)


@pytest.mark.parametrize("pattern", GLOB_PATTERNS)
def test_uri_globs_match_like_local_globs(pattern: str, tmp_path: Path) -> None:
    """The standard library's glob (what local paths use) is the reference for URI globs."""
    for rel in GLOB_TREE:
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_text("x\n")
    base = file_uri(tmp_path) + "/"
    try:
        local = [p.relative_to(tmp_path).as_posix() for p in TextSource(paths=pattern).resolve(tmp_path)]
    except SourceMissingError:
        local = []
    try:
        found = [str(u) for u in TextSource(paths=base + pattern).resolve(tmp_path)]
    except SourceMissingError:
        found = []
    assert all(u.startswith(base) for u in found)
    assert [u[len(base) :] for u in found] == local


@needs_mock
def test_hash_file_streams_a_uri(corpus: Path, memfs: Any, tmp_path: Path) -> None:
    for rel in ("data/text/a.txt", "data/jsonl/b.jsonl.gz", "data/parquet/a.parquet"):
        want = hash_file(corpus / rel)
        assert hash_file(file_uri(corpus / rel), block=4096) == want
        assert hash_file(f"{MEM}/{rel}", block=1000) == want  # many blocks; gzip bytes not decompressed
    memfs.open_output_stream("bucket/empty.txt").close()
    (tmp_path / "empty.txt").write_bytes(b"")
    assert hash_file(f"{MEM}/empty.txt") == hash_file(tmp_path / "empty.txt")


# -- (d) errors ------------------------------------------------------------------------------------


def test_unknown_scheme_is_a_recipe_error_naming_the_uri(corpus: Path, tmp_path: Path) -> None:
    with pytest.raises(RecipeError, match=re.escape("nosuchscheme://bucket/data/*.txt")):
        build_glob(corpus, "text", "nosuchscheme://bucket/data/*.txt", tmp_path / "out")


def test_uri_glob_matching_nothing(corpus: Path, tmp_path: Path) -> None:
    for pattern in (
        file_uri(corpus) + "/data/text/*.nothing",
        file_uri(corpus) + "/no/such/dir/*.txt",
        file_uri(corpus) + "/data/text/missing.txt",
        file_uri(corpus) + "/data/text",
    ):
        with pytest.raises(SourceMissingError, match=r"glob .* matched no file") as caught:
            build_glob(corpus, "text", pattern, tmp_path / "out")
        assert pattern in str(caught.value)


@needs_mock
def test_unreachable_filesystem_is_a_source_error(memfs: Any, corpus: Path, tmp_path: Path) -> None:
    filesystem.register_filesystem("down://bucket", pafs.PyFileSystem(_Wrapped(memfs, broken=True)), root="bucket")
    with pytest.raises(SourceError, match=re.escape("down://bucket/data/text/*.txt")) as caught:
        build_glob(corpus, "text", "down://bucket/data/text/*.txt", tmp_path / "out")
    assert "connection refused (simulated)" in str(caught.value)


class _RemoveBeforeFirstTask(InlineExecutor):
    """Runs tasks in this process; removes a file just before the first one (after planning)."""

    def __init__(self, remove: Callable[[], None]) -> None:
        self.remove: Callable[[], None] | None = remove

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        if self.remove is not None:
            self.remove()
            self.remove = None
        return super().submit(fn, *args, **kwargs)


@pytest.mark.parametrize("where", ["file", "memory"])
def test_file_removed_after_planning_names_the_uri(where: str, tmp_path: Path, request: pytest.FixtureRequest) -> None:
    root = write_corpus(tmp_path / "src")
    if where == "file":
        pattern = file_uri(root) + "/data/text/**/*.txt"
        gone = file_uri(root / "data/text/a.txt")

        def remove() -> None:
            (root / "data/text/a.txt").unlink()
    else:
        if MockFileSystem is None:
            pytest.skip("this pyarrow has no _MockFileSystem")
        mem = request.getfixturevalue("memfs")
        pattern, gone = f"{MEM}/data/text/**/*.txt", f"{MEM}/data/text/a.txt"

        def remove() -> None:
            mem.delete_file("bucket/data/text/a.txt")

    with pytest.raises(SourceMissingError, match="removed after the glob matched") as caught:
        build_glob(root, "text", pattern, tmp_path / "out", executor=_RemoveBeforeFirstTask(remove))
    assert gone in str(caught.value)


# -- the README ------------------------------------------------------------------------------------


def test_readme_uri_snippet_parses() -> None:
    """The README's object-store snippet is a valid source table whose paths are a URI."""
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    (snippet,) = [b for b in re.findall(r"```toml\n(.*?)```", readme, flags=re.S) if "s3://" in b]
    recipe = parse_recipe("[[sources]]\n" + snippet + '\n[tokenizer]\nkind = "words"\n')
    (source,) = recipe.sources
    assert all(filesystem.is_uri(p) and p.startswith("s3://") for p in source.paths)
    assert "not read directly yet" not in readme
