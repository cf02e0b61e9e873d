"""Parts that hold many small inputs: same dataset bytes, each document's own input, cache keys
per group, cached rebuilds that open no input, errors naming the file inside a group."""

from __future__ import annotations

import random
import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import xxhash

import seqpipe._build as build_module
from seqpipe import build
from seqpipe._build import plan_build
from seqpipe.dataset import open_dataset
from seqpipe.errors import InvalidUtf8Error, PatternTimeoutError
from seqpipe.ingest import IngestTask, Member, _in_member
from seqpipe.recipe import Recipe, parse_recipe
from seqpipe.sources.base import Part

WORDS = ("ferry", "river", "north", "bank", "calm", "tide", "rope", "deck", "wharf", "fog", "pier", "crew")
RECIPE = """\
[[sources]]
kind = "text"
paths = "notes/**/*.txt"
document = "{document}"
on_invalid_utf8 = "{invalid}"
max_document_bytes = 400
on_oversize = "skip"
[tokenizer]
kind = "words"
[vocabulary]
cap = {cap}
[splits]
train = 0.6
validation = 0.2
test = 0.2
[shards]
tokens = 200
"""


def _words(rnd: random.Random, n: int) -> str:
    return " ".join(rnd.choice(WORDS) for _ in range(n))


def write_notes(root: Path, files: int = 60, seed: int = 3, *, awkward: bool = True) -> list[Path]:
    """Small files in nested directories, one or a few paragraphs each; with ``awkward`` also a
    byte order mark, CRLF line ends, a blank file, trailing blanks without a line end, an
    oversize paragraph and bytes that are not UTF-8."""
    rnd = random.Random(seed)
    paths = []
    for i in range(files):
        path = root / "notes" / f"shelf-{i % 3}" / f"box-{i % 4}" / f"note-{i:03d}.txt"
        path.parent.mkdir(parents=True, exist_ok=True)
        text = "\n\n".join(_words(rnd, rnd.randint(1, 12)) for _ in range(rnd.choice((1, 1, 1, 2, 3)))) + "\n"
        data = text.encode()
        if awkward and i == 5:
            data = b"\xef\xbb\xbf" + data
        elif awkward and i == 9:
            data = data.replace(b"\n", b"\r\n")
        elif awkward and i == 13:
            data = b" \n\t\n"
        elif awkward and i == 17:
            data = data.rstrip(b"\n") + b"  "
        elif awkward and i == 21:
            data = (_words(rnd, 120) + "\n").encode()  # over max_document_bytes: skipped
        elif awkward and i == 25:
            data = b"calm \xff tide\n"
        path.write_bytes(data)
        paths.append(path)
    return paths


def recipe_of(root: Path, *, document: str = "paragraph", invalid: str = "replace", cap: int = 0) -> Recipe:
    return parse_recipe(RECIPE.format(document=document, invalid=invalid, cap=cap), root)


def dataset_files(out: Path) -> dict[str, bytes]:
    return {
        str(p.relative_to(out)): p.read_bytes()
        for p in sorted(out.rglob("*"))
        if p.is_file() and ".seqpipe" not in p.parts
    }


@pytest.mark.parametrize("document", ["paragraph", "line", "file"])
def test_grouped_small_files_give_the_same_dataset_bytes(
    tmp_path: Path, document: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Many small files built in shared parts give byte for byte the dataset built with one part
    per file (grouping off) and the one built with parts of 64 bytes (large files cut)."""
    write_notes(tmp_path)
    recipe = recipe_of(tmp_path, document=document)
    grouped = build(recipe, tmp_path / "grouped", workers=1, progress=False)
    assert grouped.parts_total == 1
    monkeypatch.setattr(build_module, "GROUP_INPUTS", False)
    alone = build(recipe, tmp_path / "alone", workers=1, progress=False)
    assert alone.parts_total == len(grouped.manifest["inputs"])
    tiny = build(recipe, tmp_path / "tiny", workers=1, progress=False, part_bytes=64)
    assert tiny.parts_total > alone.parts_total or document == "file"  # a file document is never cut
    want = dataset_files(tmp_path / "alone")
    assert dataset_files(tmp_path / "grouped") == want
    assert dataset_files(tmp_path / "tiny") == want


def test_each_document_keeps_its_own_input_inside_a_group(tmp_path: Path) -> None:
    """In a part holding many files, the documents table's ``input`` names each document's own
    file: the file's text hashes (XXH3-128, as documents are hashed) to the document's hash."""
    paths = write_notes(tmp_path, awkward=False)
    for i, path in enumerate(paths):  # one paragraph per file, so a file's text is its document
        path.write_text(f"note {i} " + " ".join(WORDS[: 1 + i % len(WORDS)]) + "\n")
    result = build(recipe_of(tmp_path, document="file"), tmp_path / "out", workers=1, progress=False)
    assert result.parts_total == 1
    ds = open_dataset(result.directory)
    inputs = result.manifest["inputs"]
    seen = 0
    for name in ds.splits:
        table = ds.split(name).documents
        for index, digest in zip(table.column("input").to_pylist(), table.column("hash").to_pylist(), strict=True):
            text = (tmp_path / "notes" / inputs[index]["path"]).read_bytes()
            assert xxhash.xxh3_128_digest(text) == digest
            seen += 1
    assert seen == len(paths)


def test_a_changed_file_changes_only_its_groups_key(tmp_path: Path) -> None:
    """With parts of about 600 bytes, editing one file changes the cache key of the one part
    holding it and no other."""
    paths = write_notes(tmp_path, files=40, awkward=False)
    recipe = recipe_of(tmp_path)
    before = plan_build(recipe, tmp_path / "cache", 600)
    assert len(before.tasks) > 3 and all(len(t.members) >= 1 for t in before.tasks)
    victim = paths[17]
    victim.write_text(victim.read_text() + "fog fog\n")
    after = plan_build(recipe, tmp_path / "cache", 600)
    changed = [a.key != b.key for a, b in zip(before.tasks, after.tasks, strict=True)]
    holding = [any(Path(m.path) == victim for m in t.members) for t in after.tasks]
    assert changed == holding and sum(changed) == 1


def test_a_cached_rebuild_reads_no_input(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A rebuild that only changes the vocabulary takes every part from the cache without
    reading, hashing or planning any input file (those calls are made to fail)."""
    write_notes(tmp_path)
    first = build(recipe_of(tmp_path), tmp_path / "out", workers=1, progress=False, part_bytes=400)
    assert first.parts_total > 2

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("an input was opened")

    from seqpipe.sources.text import TextSource

    for name in ("read", "read_many", "plan"):
        monkeypatch.setattr(TextSource, name, refuse)
    real_hash = build_module.hash_file

    def hash_outputs_only(path: Path) -> str:
        assert "notes" not in Path(path).parts, "an input was hashed"
        return real_hash(path)

    monkeypatch.setattr(build_module, "hash_file", hash_outputs_only)
    monkeypatch.setattr(build_module, "_hash_input", refuse)
    again = build(recipe_of(tmp_path, cap=8), tmp_path / "out", workers=1, progress=False, part_bytes=400)
    assert again.parts_reused == again.parts_total == first.parts_total
    assert again.bytes_read == 0
    # without the stored plan, planning again takes every hash from the stored input hashes
    (tmp_path / "out" / ".seqpipe" / "cache" / "plan.json").unlink()
    third = build(recipe_of(tmp_path, cap=9), tmp_path / "out", workers=1, progress=False, part_bytes=400)
    assert third.parts_reused == third.parts_total == first.parts_total
    assert third.manifest["inputs"] == first.manifest["inputs"]


def test_an_error_inside_a_group_names_its_file(tmp_path: Path) -> None:
    """Bytes that are not UTF-8 in one file of a shared part (policy error) fail the build with
    a message naming that file, not the part's first."""
    paths = write_notes(tmp_path, awkward=False)
    bad = paths[23]
    bad.write_bytes(b"tide \xfe calm\n")
    with pytest.raises(InvalidUtf8Error) as caught:
        build(recipe_of(tmp_path, invalid="error"), tmp_path / "out", workers=1, progress=False)
    assert str(bad) in str(caught.value)
    assert str(paths[0]) not in str(caught.value)


def test_a_pattern_timeout_names_the_member_and_its_document() -> None:
    """A pattern timeout on document 5 of a part whose members gave 3 and 4 documents names the
    second member and its document 2."""
    members = (Member(0, "notes/a.txt", Part(0, 10)), Member(1, "notes/b.txt", Part(0, 20)))
    task = IngestTask(
        parse_recipe(RECIPE.format(document="line", invalid="error", cap=0), Path(".")), 0, members, "k", "."
    )
    exc = PatternTimeoutError(
        "clean[0] replace: pattern 'x' ran long on document 5 (starting 'a')",
        step="clean[0] replace",
        pattern="x",
        document=5,
    )
    got = _in_member(exc, task, [3, 4])
    assert got.document == 2
    assert str(got).startswith("notes/b.txt: ") and "on document 2 " in str(got)


def test_grouped_part_stores_one_arrow_file(tmp_path: Path) -> None:
    """A part of many files is one Arrow file (and its counts) and its meta in the cache: its
    documents' member column counts every document of every file in order."""
    write_notes(tmp_path, awkward=False)
    build(recipe_of(tmp_path), tmp_path / "out", workers=1, progress=False)
    [part] = [p for p in (tmp_path / "out" / ".seqpipe" / "cache" / "parts").iterdir()]
    from seqpipe.ingest import counts_file, read_part_docs

    # the counts its ingest task made (no dedupe step) are kept for rebuilds with these splits
    assert sorted(p.name for p in part.iterdir()) == sorted(
        [counts_file(recipe_of(tmp_path)), "meta.json", "part.arrow"]
    )

    member = read_part_docs(str(part.parent.parent), part.name).column("member").to_numpy()
    assert len(member) and bool(np.all(np.diff(member) >= 0)) and member.dtype == np.int32
    assert pa.types.is_int32(pa.array(member).type)


def test_a_rebuild_from_stored_counts_equals_a_fresh_build(tmp_path: Path) -> None:
    """A rebuild with another vocabulary cap, its counts taken from the parts' stored counts,
    writes the same dataset bytes as a fresh build (``force``) with that cap."""
    write_notes(tmp_path)
    build(recipe_of(tmp_path), tmp_path / "out", workers=1, progress=False, part_bytes=300)
    again = build(recipe_of(tmp_path, cap=9), tmp_path / "out", workers=1, progress=False, part_bytes=300)
    assert again.parts_reused == again.parts_total > 2
    build(recipe_of(tmp_path, cap=9), tmp_path / "fresh", workers=1, progress=False, part_bytes=300, force=True)
    assert dataset_files(tmp_path / "out") == dataset_files(tmp_path / "fresh")


def test_a_rebuild_of_the_same_parts_takes_the_corpus_counts_without_counting(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A second vocabulary change reads the corpus counts the cache keeps (no count task runs,
    count_part is made to fail) and writes the bytes of a fresh build with that cap."""
    write_notes(tmp_path)
    build(recipe_of(tmp_path), tmp_path / "out", workers=1, progress=False, part_bytes=300)
    assert (tmp_path / "out" / ".seqpipe" / "cache" / build_module.MERGED_COUNTS).is_file()

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("a part was counted")

    monkeypatch.setattr(build_module, "count_part", refuse)
    build(recipe_of(tmp_path, cap=9), tmp_path / "out", workers=1, progress=False, part_bytes=300)
    monkeypatch.undo()
    build(recipe_of(tmp_path, cap=9), tmp_path / "fresh", workers=1, progress=False, part_bytes=300, force=True)
    assert dataset_files(tmp_path / "out") == dataset_files(tmp_path / "fresh")


@pytest.mark.parametrize("change", ["tampered", "input edited"])
def test_stored_corpus_counts_are_not_taken_after_a_change(tmp_path: Path, change: str) -> None:
    """Corpus counts whose values were altered (their hash no longer matches) or that another
    corpus made (an input edited, so a part key differs) are merged again: the rebuild writes
    the bytes of a fresh build."""
    paths = write_notes(tmp_path)
    build(recipe_of(tmp_path), tmp_path / "out", workers=1, progress=False, part_bytes=300)
    stored = tmp_path / "out" / ".seqpipe" / "cache" / build_module.MERGED_COUNTS
    if change == "tampered":
        table = pa.ipc.open_file(pa.memory_map(str(stored))).read_all()
        doubled = pa.array(table.column("count").to_numpy() * 2, pa.int64())
        table = table.set_column(table.schema.get_field_index("count"), "count", doubled)
        with pa.OSFile(str(stored), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
            writer.write_table(table)
    else:
        paths[0].write_text("wharf wharf wharf fog\n")
    build(recipe_of(tmp_path, cap=9), tmp_path / "out", workers=1, progress=False, part_bytes=300)
    build(recipe_of(tmp_path, cap=9), tmp_path / "fresh", workers=1, progress=False, part_bytes=300, force=True)
    assert dataset_files(tmp_path / "out") == dataset_files(tmp_path / "fresh")


def test_stored_cuts_follow_the_inputs(tmp_path: Path) -> None:
    """The cache keeps one entry of cuts per input planned by the last build (inputs larger than
    the part size: smaller ones are planned from their size): a removed file's entry goes, an
    edited file's entry is replaced."""
    import json

    paths = write_notes(tmp_path, files=12, awkward=False)
    cache = tmp_path / "cache"
    recipe = recipe_of(tmp_path)
    plan_build(recipe, cache, 1)
    assert len(json.loads((cache / "plans.json").read_text())) == 12
    paths[3].unlink()
    paths[4].write_text("tide calm\n\nrope deck\n")
    plan_build(recipe, cache, 1)
    stored = json.loads((cache / "plans.json").read_text())
    assert len(stored) == 11
    assert [[p.start, p.stop] for p in recipe.sources[0].plan(str(paths[4]), 1)] in stored.values()


@pytest.mark.parametrize("document", ["file", "line", "paragraph"])
def test_small_inputs_planned_from_their_size_as_plan_would(tmp_path: Path, document: str) -> None:
    """``plan_sized`` (no read, no stat) gives what ``plan`` gives for an uncompressed input no
    larger than the part size, declines a larger or compressed one, and stores no cuts for it."""
    paths = write_notes(tmp_path, files=8, awkward=False)
    source = recipe_of(tmp_path, document=document).sources[0]
    for path in paths:
        size = path.stat().st_size
        assert source.plan_sized(str(path), size, size) == source.plan(str(path), size)
        if document != "file":
            assert source.plan_sized(str(path), size, size - 1) is None
    assert source.plan_sized(str(paths[0]) + ".gz", 5, 100) is None
    plan_build(recipe_of(tmp_path, document=document), tmp_path / "cache", 1 << 20)
    assert not (tmp_path / "cache" / "plans.json").exists()


@pytest.mark.parametrize("held_bytes", [0, 3000])
def test_encoded_parts_held_in_memory_or_written_give_the_same_dataset(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, held_bytes: int
) -> None:
    """Encode tasks on the driver's threads hand their ids to the shard tasks in memory up to a
    bound and through files beyond it: with no memory at all, or room for only some parts, the
    dataset's bytes are those of a build that held every part; nothing stays held after it."""
    import seqpipe.ingest as ingest_module

    write_notes(tmp_path, files=60, awkward=False)
    recipe = recipe_of(tmp_path)
    build(recipe, tmp_path / "held", part_bytes=300, progress=False)
    monkeypatch.setattr(ingest_module, "HELD_BYTES", held_bytes)
    build(recipe, tmp_path / "files", part_bytes=300, progress=False)
    assert dataset_files(tmp_path / "files") == dataset_files(tmp_path / "held")
    assert not [name for name in ingest_module._HELD.items if name.startswith(str(tmp_path))]


@pytest.mark.parametrize("held_bytes", [0, 2000])
def test_inputs_held_from_hashing_give_the_same_dataset(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, held_bytes: int
) -> None:
    """Small inputs read to hash them are handed to the ingest tasks in memory up to a bound:
    with none held or only some, the dataset's bytes are those of a build that held them all,
    and nothing stays held after a build."""
    import seqpipe.sources._stream as stream_module

    write_notes(tmp_path, files=60)
    recipe = recipe_of(tmp_path)
    build(recipe, tmp_path / "held", part_bytes=300, progress=False)
    assert not stream_module._HELD_INPUTS
    monkeypatch.setattr(stream_module, "HELD_INPUT_BYTES", held_bytes)
    build(recipe, tmp_path / "read", part_bytes=300, progress=False)
    assert dataset_files(tmp_path / "read") == dataset_files(tmp_path / "held")
    assert not stream_module._HELD_INPUTS


def test_held_input_changed_before_ingest_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """An input edited after planning read (and held) it is refused by its ingest task as a
    read of it would be: the held bytes are not what the file holds now."""
    from seqpipe.errors import SourceError

    paths = write_notes(tmp_path, files=6, awkward=False)
    real_ingest = build_module.ingest

    def edit_then_ingest(*args: object, **kwargs: object) -> object:
        paths[2].write_text("pier fog pier fog pier fog pier fog\n")
        return real_ingest(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(build_module, "ingest", edit_then_ingest)
    with pytest.raises(SourceError, match="changed while the build was reading it"):
        build(recipe_of(tmp_path), tmp_path / "out", progress=False)


def _plan_tuple(plan: object) -> tuple[object, ...]:
    """What a plan decides (its tasks' recipe aside): inputs, each part's source, key and members."""
    from seqpipe._build import Plan

    assert isinstance(plan, Plan)
    parts = tuple((t.source_index, t.key, t.members) for t in plan.tasks)
    return plan.inputs, parts, plan.weights, plan.input_bytes, plan.build_key


def test_a_stored_plan_equals_planning_afresh(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A rebuild of unchanged inputs takes the stored plan (hashing and cutting nothing), and
    it is the plan that planning again without any cache gives."""
    write_notes(tmp_path, files=40)
    recipe = recipe_of(tmp_path)
    first = plan_build(recipe, tmp_path / "cache", 600)
    assert (tmp_path / "cache" / "plan.json").exists()

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("planned again")

    with monkeypatch.context() as patch:
        patch.setattr(build_module, "_group_inputs", refuse)
        again = plan_build(recipe, tmp_path / "cache", 600)
    fresh = plan_build(recipe, tmp_path / "other-cache", 600)
    assert _plan_tuple(again) == _plan_tuple(first) == _plan_tuple(fresh)


@pytest.mark.parametrize("change", ["edit", "touch", "remove", "add", "part size", "tokenizer"])
def test_a_stored_plan_is_not_taken_after_a_change(tmp_path: Path, change: str) -> None:
    """Any change to an input's name, stamp or to what part keys hold plans again, and gives
    the plan a build without a cache gives."""
    import os

    paths = write_notes(tmp_path, files=30, awkward=False)
    recipe, size = recipe_of(tmp_path), 600
    plan_build(recipe, tmp_path / "cache", size)
    if change == "edit":
        paths[7].write_text("rope deck\n")
    elif change == "touch":
        st = paths[7].stat()
        os.utime(paths[7], ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    elif change == "remove":
        paths[7].unlink()
    elif change == "add":
        (paths[7].parent / "note-extra.txt").write_text("crew calm\n")
    elif change == "part size":
        size = 900
    else:
        recipe = parse_recipe(
            RECIPE.format(document="paragraph", invalid="replace", cap=0).replace("words", "chars"), tmp_path
        )
    again = plan_build(recipe, tmp_path / "cache", size)
    fresh = plan_build(recipe, tmp_path / "other-cache", size)
    assert _plan_tuple(again) == _plan_tuple(fresh)


def test_no_plan_is_stored_when_an_input_changed_while_hashed(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A file that changed while it was hashed leaves no stored plan (its hash may not be that
    of the bytes its stamp names), so the next build hashes it again."""
    paths = write_notes(tmp_path, files=6, awkward=False)
    real = build_module._hash_input

    def changing(f: object, stamp: object, hold: bool = False) -> tuple[str, object]:
        if str(f) == str(paths[2]):  # after its stamp was taken (listing), before it is read
            paths[2].write_text("pier fog pier fog pier fog pier fog\n")
        return real(f, stamp, hold)  # type: ignore[arg-type]

    monkeypatch.setattr(build_module, "_hash_input", changing)
    plan_build(recipe_of(tmp_path), tmp_path / "cache", 600)
    assert not (tmp_path / "cache" / "plan.json").exists()


@pytest.mark.parametrize("clean", ["", '[[clean]]\nkind = "dedupe"\n'])
def test_parts_started_while_planning_give_the_same_dataset(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, clean: str
) -> None:
    """On the driver's threads, a part's ingest starts as soon as its inputs are hashed and
    another part follows, while later inputs are still being read (the last one when planning
    ends), each with the ingest threads of one of two tasks; a rebuild leaves its changed part to
    the ingest phase, which gives it the pool's threads. The dataset's bytes and
    figures are those of a build whose tasks run one by one after planning (one thread: no
    early start), with parts counted by their ingest task (no dedupe) or in the count phase."""
    write_notes(tmp_path, files=60, awkward=False)
    (tmp_path / "notes" / "shelf-0" / "box-0" / "note-000.txt").write_text("calm tide\n\ncalm tide\n")
    recipe = parse_recipe(RECIPE.format(document="paragraph", invalid="replace", cap=0) + clean, tmp_path)
    started: list[int] = []
    threads: list[int | None] = []
    real = build_module._EarlyIngest.__call__
    real_ingest = build_module.ingest_part

    def spy(self: Any, i: int, task: IngestTask, last: bool = False) -> None:
        real(self, i, task, last)
        if i in self.started:
            started.append(i)

    def counted_threads(task: IngestTask) -> object:
        threads.append(task.threads)
        return real_ingest(task)

    monkeypatch.setattr(build_module, "ingest_part", counted_threads)

    monkeypatch.setattr(build_module._EarlyIngest, "__call__", spy)
    monkeypatch.setenv("SEQPIPE_TASK_THREADS", "2")
    early = build(recipe, tmp_path / "early", part_bytes=300, progress=False)
    parts = early.parts_total
    assert parts > 3 and started == list(range(parts))  # each as soon as its inputs were hashed
    assert threads == [1] * parts  # each the share of one of two tasks side by side
    threads.clear()
    one_part = build(recipe, tmp_path / "one-part", progress=False)  # default part size: one part
    assert one_part.parts_total == 1 and len(started) == parts and threads == [2]  # not started early
    monkeypatch.setenv("SEQPIPE_TASK_THREADS", "1")
    inline = build(recipe, tmp_path / "inline", part_bytes=300, progress=False)
    assert len(started) == parts  # none started early inline
    assert dataset_files(tmp_path / "early") == dataset_files(tmp_path / "inline")
    assert early.manifest["summary"] == inline.manifest["summary"]
    again = build(recipe, tmp_path / "early", part_bytes=300, progress=False)
    assert again.parts_reused == parts  # the parts ingested early were stored whole
    # a rebuild with one input changed: its part alone is ingested, with the pool's threads
    monkeypatch.setenv("SEQPIPE_TASK_THREADS", "2")
    edit = tmp_path / "notes" / "shelf-1" / "box-1" / "note-001.txt"
    edit.write_bytes(edit.read_bytes()[::-1])  # the same size, so no part boundary moves
    threads.clear()
    edited = build(recipe, tmp_path / "early", part_bytes=300, progress=False)
    assert edited.parts_reused == parts - 1 and threads == [2]


def test_a_failed_plan_waits_for_the_parts_it_started(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """When planning fails after some parts' ingest started (an input vanished), the build
    reports the planning error, naming the file, and no started task is left running or
    holding inputs."""
    import seqpipe.sources._stream as stream_module
    from seqpipe.errors import SourceMissingError
    from seqpipe.executors import task_pool

    paths = write_notes(tmp_path, files=40, awkward=False)
    real = build_module._hash_input
    started: list[object] = []
    finished: list[object] = []
    real_ingest = build_module.ingest_part

    def slow_ingest(task: IngestTask) -> object:
        started.append(task.key)
        time.sleep(0.2)  # still running when planning fails, unless the build waits
        out = real_ingest(task)
        finished.append(task.key)
        return out

    def vanishing(f: object, stamp: object, hold: bool = False) -> tuple[str, object]:
        if str(f) == str(paths[-1]):
            paths[-1].unlink()
        return real(f, stamp, hold)  # type: ignore[arg-type]

    monkeypatch.setattr(build_module, "_hash_input", vanishing)
    monkeypatch.setattr(build_module, "ingest_part", slow_ingest)
    monkeypatch.setenv("SEQPIPE_TASK_THREADS", "2")
    # a caller's pool, which the build does not shut down (that would wait for its tasks too)
    with task_pool(None, None) as pool:
        with pytest.raises(SourceMissingError, match=r"note-039\.txt.*removed after the glob matched"):
            build(recipe_of(tmp_path), tmp_path / "out", executor=pool, part_bytes=300, progress=False)
        assert started and finished == started  # parts had started, and ended before the error came
    assert not stream_module._HELD_INPUTS
