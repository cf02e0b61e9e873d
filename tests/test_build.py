"""End-to-end builds: known answers, determinism, summaries, verification, bad input via the CLI."""

from __future__ import annotations

import json
import os
import random
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from seqpipe import build
from seqpipe._verify import verify
from seqpipe.cli import main
from seqpipe.dataset import open_dataset
from seqpipe.errors import EmptyCorpusError, InvalidUtf8Error, SourceError, SourceMissingError
from seqpipe.recipe import load_recipe, parse_recipe

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
KNOWN = sorted(p for p in (FIXTURES / "known").iterdir() if p.is_dir())

WORDS = [
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
]


def write_corpus(root: Path, files: int = 3, docs: int = 40, seed: int = 3) -> Path:
    """A small invented corpus of paragraph documents (demo data, not a reference)."""
    rnd = random.Random(seed)
    (root / "logs").mkdir(parents=True, exist_ok=True)
    for f in range(files):
        paras = [" ".join(rnd.choice(WORDS) for _ in range(rnd.randint(3, 30))).capitalize() + "." for _ in range(docs)]
        (root / "logs" / f"day{f}.txt").write_text("\n\n".join(paras) + "\n", encoding="utf-8")
    return root


RECIPE = """
[[sources]]
kind = "text"
paths = "logs/*.txt"
document = "paragraph"
[[clean]]
kind = "lowercase"
[tokenizer]
kind = "words"
[shards]
tokens = 500
"""


def files_of(d: Path) -> dict[str, bytes]:
    return {
        p.relative_to(d).as_posix(): p.read_bytes()
        for p in sorted(d.rglob("*"))
        if p.is_file() and ".seqpipe" not in p.parts
    }


@pytest.mark.parametrize("case", KNOWN, ids=[p.name for p in KNOWN])
def test_known_answers(case: Path, tmp_path: Path) -> None:
    """Tiny inputs give exactly the hand-derived vocabulary, ids and document offsets."""
    expected = json.loads((case / "expected.json").read_text())
    res = build(load_recipe(case / "recipe.toml"), tmp_path / "out", workers=1, progress=False)
    ds = open_dataset(res.directory)
    assert [t.decode() for t in ds.vocabulary.tokens.to_pylist()] == expected["vocabulary"]
    train = ds.split("train")
    assert train.stream.slice(0, len(train.stream)).tolist() == expected["train"]
    assert train.documents.column("start").to_pylist() == expected["doc_starts"]
    assert train.documents.column("length").to_pylist() == expected["doc_lengths"]


# A river-ferry timetable reduced to the characters a departure board shows: digits, the colon,
# the letters of am/pm and the space between fields. Every other character is removed by the
# cleaning chain, so only the reserved unknown token stands for it.
TIMETABLE = (
    "Marrow Belle: dep Cobble Quay 06:45 am, arr Nettle Point 07:20 am (Mon-Sat)\n"
    "Quill: dep Eastreach 12:05 pm, arr Lower Fenn 01:50 pm; no sailing in fog!\n"
    "Old Tansy: dep the Weir Steps 13:38, arr Ashford Landing 19:29 - fares 4 tokens\n"
)
BOARD_ALPHABET = " 0123456789:amp"


def test_cleaning_to_a_board_alphabet_fixes_the_vocabulary(tmp_path: Path) -> None:
    """Cleaning text down to a fixed alphabet makes the character vocabulary exactly that alphabet
    plus the reserved unknown, which then stands for every other character."""
    (tmp_path / "in.txt").write_text(TIMETABLE * 5)
    recipe = parse_recipe(
        f"""
[[sources]]
kind = "text"
paths = "in.txt"
document = "line"
[[clean]]
kind = "lowercase"
[[clean]]
kind = "replace"
pattern = "[^{BOARD_ALPHABET}]"
replacement = ""
[tokenizer]
kind = "chars"
[vocabulary]
reserved = ["<unk>"]
padding = ""
begin = ""
end = ""
[encode]
append_end = false
[splits]
train = 1.0
validation = 0.0
test = 0.0
""",
        tmp_path,
    )
    res = build(recipe, tmp_path / "out", workers=1, progress=False)
    ds = open_dataset(res.directory)
    tokens = [t.decode() for t in ds.vocabulary.tokens.to_pylist()]
    assert tokens[0] == "<unk>"
    assert sorted(tokens[1:]) == sorted(BOARD_ALPHABET)
    assert res.manifest["vocabulary"]["entries"] == len(BOARD_ALPHABET) + 1
    unknown = ds.vocabulary.unknown_id
    assert unknown not in ds.encoder.encode("09:15 pm").tolist()
    assert ds.encoder.encode("Dock!", clean=False).tolist() == [unknown] * 5
    # with the dataset's cleaning (the default) the text is lowercased and off-board characters removed first
    assert ds.encoder.encode("09:15 PM!").tolist() == ds.encoder.encode("09:15 pm", clean=False).tolist()


def test_builds_are_byte_identical_and_hashseed_free(tmp_path: Path) -> None:
    """Two builds of one recipe are byte-identical, also under a different PYTHONHASHSEED."""
    root = write_corpus(tmp_path / "c")
    (root / "recipe.toml").write_text(RECIPE)
    a = build(load_recipe(root / "recipe.toml"), tmp_path / "a", workers=1, progress=False)
    b = build(load_recipe(root / "recipe.toml"), tmp_path / "b", workers=1, progress=False, force=True)
    assert files_of(a.directory) == files_of(b.directory)
    env = {**os.environ, "PYTHONHASHSEED": "12345"}
    subprocess.run(
        [
            sys.executable,
            "-m",
            "seqpipe.cli",
            "build",
            str(root / "recipe.toml"),
            "-o",
            str(tmp_path / "c2"),
            "--workers",
            "1",
            "--quiet",
        ],
        check=True,
        env=env,
    )
    assert files_of(tmp_path / "c2") == files_of(a.directory)


def test_summary_and_manifest_figures(tmp_path: Path) -> None:
    """The manifest's counts add up across shards and docs tables; the summary has every split."""
    root = write_corpus(tmp_path / "c")
    res = build(parse_recipe(RECIPE, root), tmp_path / "out", workers=1, progress=False)
    m = res.manifest
    ds = open_dataset(res.directory)
    total_docs = 0
    for name in ("train", "validation", "test"):
        sp = ds.split(name)
        assert len(sp.stream) == m["splits"][name]["tokens"] == sum(s["tokens"] for s in m["splits"][name]["shards"])
        assert sp.documents.num_rows == m["splits"][name]["documents"]
        assert all(s["tokens"] <= 500 for s in m["splits"][name]["shards"])
        total_docs += sp.num_documents
    assert total_docs == 120
    lines = "\n".join(res.summary_lines())
    assert "train" in lines and "unknown" in lines and "tokens/word" in lines and "bytes/token" in lines
    train = ds.split("train")
    ends = train.documents.column("start").to_numpy() + train.documents.column("length").to_numpy() - 1
    assert (np.asarray(train.stream.slice(0, len(train.stream)))[ends] == ds.vocabulary.id_of("end")).all()


def test_split_assignment_is_stable_under_additions(tmp_path: Path) -> None:
    """A document keeps its split when other documents are added or files reordered."""
    root = write_corpus(tmp_path / "c", files=2)
    a = open_dataset(build(parse_recipe(RECIPE, root), tmp_path / "a", workers=1, progress=False).directory)
    write_corpus(tmp_path / "c", files=4, seed=3)  # same first two files, two more added
    b = open_dataset(build(parse_recipe(RECIPE, root), tmp_path / "b", workers=1, progress=False).directory)
    for name in ("validation", "test"):
        before = set(a.split(name).documents.column("hash").to_pylist())
        after = set(b.split(name).documents.column("hash").to_pylist())
        assert before <= after


def test_verify_catches_one_changed_byte(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """verify exits 0 on an untouched build and 1 after any one byte of a shard changes."""
    root = write_corpus(tmp_path / "c")
    res = build(parse_recipe(RECIPE, root), tmp_path / "out", workers=1, progress=False)
    assert main(["verify", str(res.directory)]) == 0
    shard = res.directory / res.manifest["splits"]["train"]["shards"][0]["path"]
    raw = bytearray(shard.read_bytes())
    raw[len(raw) // 2] ^= 0x01
    shard.write_bytes(bytes(raw))
    assert main(["verify", str(res.directory)]) == 1
    out = capsys.readouterr().out
    assert "corrupt" in out and shard.name in out


def test_rebuild_reuses_parts_and_gives_same_dataset(tmp_path: Path) -> None:
    """Building twice into one directory reuses every cached part and yields the same fingerprint."""
    root = write_corpus(tmp_path / "c")
    first = build(parse_recipe(RECIPE, root), tmp_path / "out", workers=1, progress=False)
    again = build(parse_recipe(RECIPE, root), tmp_path / "out", workers=1, progress=False)
    assert again.parts_reused == again.parts_total > 0
    assert again.fingerprint == first.fingerprint
    assert verify(again.directory).ok


def test_empty_corpus_and_missing_files(tmp_path: Path) -> None:
    """A corpus that cleans down to nothing, or a glob with no match, is a clear error."""
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "a.txt").write_text("tiny\n\nwee\n")
    short = RECIPE.replace('[[clean]]\nkind = "lowercase"', '[[clean]]\nkind = "min_length"\ncharacters = 100')
    with pytest.raises(EmptyCorpusError, match="no document is left"):
        build(parse_recipe(short, tmp_path), tmp_path / "out", workers=1, progress=False)
    with pytest.raises(SourceMissingError):
        build(
            parse_recipe(RECIPE.replace("logs/*.txt", "nothing/*.txt"), tmp_path),
            tmp_path / "o2",
            workers=1,
            progress=False,
        )


def test_invalid_utf8_names_file_and_offset(tmp_path: Path) -> None:
    """Invalid UTF-8 is an error naming the file and the byte offset by default."""
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "bad.txt").write_bytes(b"good text\n\nbad \xff byte\n")
    with pytest.raises(InvalidUtf8Error) as info:
        build(parse_recipe(RECIPE, tmp_path), tmp_path / "out", workers=1, progress=False)
    assert info.value.offset == 15 and "bad.txt" in str(info.value)
    replaced = RECIPE.replace('document = "paragraph"', 'document = "paragraph"\non_invalid_utf8 = "skip"')
    res = build(parse_recipe(replaced, tmp_path), tmp_path / "out2", workers=1, progress=False)
    assert res.manifest["summary"]["read"]["invalid_utf8_skipped"] == 1


@pytest.mark.parametrize(
    ("recipe_text", "code", "needle"),
    [
        (
            "[[sources]]\nkind = 'text'\npaths = 'logs/*.txt'\n[vocabulary]\nmin_cout = 2\n",
            2,
            "did you mean 'min_count'",
        ),
        ("[[sources]]\nkind = 'text'\npaths = 'logs/*.txt'\n[shards]\ntokens = 'many'\n", 2, "expected an integer"),
        ("[[sources]]\nkind = 'text'\npaths = 'nowhere/*.txt'\n", 3, "nowhere/*.txt"),
    ],
)
def test_cli_errors_have_codes_and_no_traceback(tmp_path: Path, recipe_text: str, code: int, needle: str) -> None:
    """Bad recipes exit with their documented code and a one-line message, no traceback."""
    write_corpus(tmp_path)
    (tmp_path / "r.toml").write_text(recipe_text)
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "seqpipe.cli",
            "build",
            str(tmp_path / "r.toml"),
            "-o",
            str(tmp_path / "out"),
            "--workers",
            "1",
            "--quiet",
        ],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == code, proc.stderr
    assert needle in proc.stderr and "Traceback" not in proc.stderr


def test_cli_inspect_encode_decode(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """inspect, encode and decode work on a built dataset."""
    shutil.copytree(FIXTURES / "known" / "words-tide", tmp_path / "case")
    assert (
        main(["build", str(tmp_path / "case" / "recipe.toml"), "-o", str(tmp_path / "d"), "--workers", "1", "--quiet"])
        == 0
    )
    assert main(["inspect", str(tmp_path / "d")]) == 0
    assert "train" in capsys.readouterr().out
    assert main(["encode", str(tmp_path / "d"), "the ferry waited"]) == 0
    assert capsys.readouterr().out.split() == ["4", "8", "11"]
    assert main(["decode", str(tmp_path / "d"), "4", "8", "11"]) == 0
    assert capsys.readouterr().out.strip() == "the ferry waited"
    assert main(["inspect", str(tmp_path / "nope")]) == 4


def test_a_part_with_more_distinct_words_than_two_byte_codes_hold(tmp_path: Path) -> None:
    """Cached parts store piece codes in two bytes when at most 65,536 distinct pieces occur
    and in four otherwise (the smallest unsigned type, as for shard ids); both widths give
    back exactly the text's words. Reference: for
    words of ASCII letters and digits separated by spaces, the words are ``str.split()``
    (common practice)."""
    import pyarrow.ipc as ipc

    rnd = random.Random(5)
    words = [f"w{i}" for i in range(70_000)] + [rnd.choice(WORDS) for _ in range(30_000)]
    rnd.shuffle(words)
    (tmp_path / "logs").mkdir()
    text = "\n\n".join(" ".join(words[i : i + 50]) for i in range(0, len(words), 50)) + "\n"
    (tmp_path / "logs" / "wide.txt").write_text(text, encoding="utf-8")
    recipe = parse_recipe(
        RECIPE.replace("tokens = 500", "tokens = 1000000") + "[splits]\ntrain = 1.0\nvalidation = 0.0\ntest = 0.0\n",
        tmp_path,
    )
    result = build(recipe, tmp_path / "out", progress=False)
    [part] = (tmp_path / "out" / ".seqpipe" / "cache" / "parts").iterdir()
    with ipc.open_file(part / "part.arrow") as f:
        assert str(f.schema.field("codes").type.value_type) == "uint32"
    ds = open_dataset(result.directory)
    tokens = ds.vocabulary.tokens_for(ds.split("train").stream.slice(0, ds.split("train").num_tokens))
    assert [t.decode() for t in tokens] == [w for w in text.split()]

    small = tmp_path / "small"
    (small / "logs").mkdir(parents=True)
    few = " ".join(words[:5000])
    (small / "logs" / "narrow.txt").write_text(few + "\n", encoding="utf-8")
    result = build(parse_recipe(RECIPE, small), small / "out", progress=False)
    [part] = (small / "out" / ".seqpipe" / "cache" / "parts").iterdir()
    with ipc.open_file(part / "part.arrow") as f:
        assert str(f.schema.field("codes").type.value_type) == "uint16"
    ds = open_dataset(result.directory)
    got = [
        t.decode()
        for name in ds.splits
        for t in ds.vocabulary.tokens_for(ds.split(name).stream.slice(0, ds.split(name).num_tokens))
    ]
    assert sorted(got) == sorted(few.split())


def test_a_full_disk_names_the_file_and_leaves_the_old_dataset_and_no_staging_files(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A write failing with ENOSPC (simulated at the first fsync of a file) stops the build with
    OutputWriteError naming that file; the old dataset still verifies and no staging or
    temporary file is left in the output directory."""
    import errno

    from conftest import build_dir, write_project

    from seqpipe import shards
    from seqpipe.errors import OutputWriteError

    recipe = write_project(tmp_path / "src")
    out = build_dir(recipe, tmp_path / "out")
    old = verify(out).fingerprint
    recipe.write_text(recipe.read_text().replace("tokens = 300", "tokens = 500"))

    class FullDisk:
        def __getattr__(self, name: str) -> object:
            return getattr(os, name)

        def fsync(self, fd: int) -> None:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(shards, "os", FullDisk())
    with pytest.raises(OutputWriteError) as caught:
        build(load_recipe(recipe), out, workers=1, progress=False)
    assert caught.value.exit_code == 4
    assert str(out) in str(caught.value) and ".arrow" in str(caught.value)
    assert "No space left" in str(caught.value)
    monkeypatch.undo()
    report = verify(out)
    assert report.ok and report.fingerprint == old, report.problems
    stage = out / ".seqpipe" / "stage"
    assert not stage.exists() or not any(stage.iterdir())
    assert not [p for p in out.rglob("*") if p.name.endswith(".tmp")]


def test_a_build_with_far_too_many_shards_is_refused_before_it_starts(tmp_path: Path) -> None:
    """shards.tokens = 1 over a few megabytes would list more shards than a manifest readers
    accept can hold: the CLI refuses it with exit code 2 naming shards.tokens, writing nothing."""
    from conftest import run_cli

    src = tmp_path / "src"
    (src / "logs").mkdir(parents=True)
    line = "the evening ferry left the north pier with nine cars and a bicycle\n"
    (src / "logs" / "big.txt").write_text(line * (3_000_000 // len(line)))
    (src / "recipe.toml").write_text(
        '[dataset]\nname = "big"\n[[sources]]\nkind = "text"\npaths = "logs/*.txt"\ndocument = "line"\n'
        '[tokenizer]\nkind = "words"\n[shards]\ntokens = 1\n'
    )
    out = tmp_path / "out"
    proc = run_cli(["build", str(src / "recipe.toml"), "-o", str(out), "--workers", "1", "--quiet"], timeout=90)
    assert proc.returncode == 2, proc.stderr
    assert "shards.tokens" in proc.stderr and "Traceback" not in proc.stderr
    assert not (out / ".seqpipe" / "stage").exists() or not any((out / ".seqpipe" / "stage").iterdir())


def test_an_input_changed_before_it_is_read_fails_the_build_and_is_not_cached(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """An input rewritten (same size) between being hashed and being read would give data that
    does not match its recorded hash: the build fails with exit code 3 naming the file, and no
    part of that file is cached."""
    from conftest import write_project

    from seqpipe._build import PART_BYTES, plan_build
    from seqpipe.ingest import load_part_meta
    from seqpipe.sources.text import TextSource

    recipe_path = write_project(tmp_path / "src")
    recipe = load_recipe(recipe_path)
    victim = sorted((tmp_path / "src").rglob("*.txt"))[0]
    real_read = TextSource.read_many
    touched: list[str] = []

    def rewriting_read(self: TextSource, parts: list[tuple[str, object]], *args: object, **kwargs: object) -> object:
        if any(Path(path) == victim for path, _ in parts) and not touched:
            touched.append(str(victim))
            data = bytearray(victim.read_bytes())
            data[:5] = b"XXXXX"
            victim.write_bytes(bytes(data))
        return real_read(self, parts, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(TextSource, "read_many", rewriting_read)
    planned = plan_build(recipe, tmp_path / "planned", PART_BYTES)  # the keys the build gives its parts
    with pytest.raises(SourceError) as caught:
        build(recipe, tmp_path / "out", workers=1, progress=False)
    assert caught.value.exit_code == 3
    assert str(victim) in str(caught.value) and "changed" in str(caught.value)
    cache = tmp_path / "out" / ".seqpipe" / "cache"
    [holder] = [t for t in planned.tasks if any(Path(m.path) == victim for m in t.members)]
    assert touched and load_part_meta(str(cache), holder.key) is None


def test_a_damaged_cached_part_is_rebuilt_not_trusted(tmp_path: Path) -> None:
    """A cached part whose file no longer matches the hash it was stored with (here a valid Arrow
    file with other codes) is ingested again: the rebuild equals the first build, and the
    summary says how many parts were rebuilt."""
    import pyarrow as pa
    from conftest import build_dir, write_project

    from seqpipe.shards import read_table, write_table

    recipe = write_project(tmp_path / "src")
    out = build_dir(recipe, tmp_path / "out")
    first = verify(out).fingerprint
    parts = sorted(p for p in (out / ".seqpipe" / "cache" / "parts").iterdir() if not p.name.startswith("."))
    row = read_table(parts[0] / "part.arrow", memory_map=False)
    codes = row.column("codes").combine_chunks().flatten()
    other = pa.LargeListArray.from_arrays(pa.array([0, len(codes)], pa.int64()), pa.array([0] * len(codes), codes.type))
    write_table(parts[0] / "part.arrow", row.set_column(row.schema.get_field_index("codes"), "codes", other))
    result = build(load_recipe(recipe), out, workers=1, progress=False)
    assert result.fingerprint == first
    assert result.parts_reused == result.parts_total - 1
    assert any("1 cached part(s) did not match" in line for line in result.summary_lines())
    assert verify(out).ok


def test_summary_warns_about_empty_validation_and_test_splits(tmp_path: Path) -> None:
    """A corpus too small to give every split a document builds, but the summary names each empty
    split with a warning instead of listing it as if nothing were wrong."""
    from conftest import write_project

    recipe = load_recipe(write_project(tmp_path / "src", files=1, paragraphs=2))
    result = build(recipe, tmp_path / "out", workers=1, progress=False)
    empty = [n for n, sp in result.manifest["splits"].items() if sp["documents"] == 0]
    assert empty, "the corpus was meant to leave a split empty"
    warnings = [line for line in result.summary_lines() if line.startswith("warning")]
    assert len(warnings) == len(empty)
    assert all(any(f"split {name!r}" in w for w in warnings) for name in empty)


def _project(root: Path, extra: str, tokenizer: str = "words") -> Path:
    """The conftest corpus and recipe with ``extra`` recipe lines and another tokenizer kind."""
    from conftest import write_project

    recipe = write_project(root, files=2, paragraphs=40)
    text = recipe.read_text(encoding="utf-8").replace('kind = "words"', f'kind = "{tokenizer}"')
    recipe.write_text(text + extra, encoding="utf-8")
    return recipe


def _train_bincount(directory: Path) -> np.ndarray:
    """Occurrences of every id in the train split, recomputed from its shards."""
    ds = open_dataset(directory)
    ids = np.concatenate([np.asarray(c) for c in ds.split("train").stream.chunks])
    return np.bincount(ids.astype(np.int64), minlength=len(ds.vocabulary))


@pytest.mark.parametrize("tokenizer", ["words", "bpe"])
def test_vocabulary_count_column_is_the_train_shards_id_count(tmp_path: Path, tokenizer: str) -> None:
    """vocab.arrow's ``count`` is how often each id occurs in the train shards (np.bincount over
    them), reserved tokens and markers included -- not 0 for reserved tokens, nor bpe's pre-merge
    symbol counts."""
    extra = "[vocabulary]\ncap = 320\n[encode]\nprepend_begin = true\n" if tokenizer == "bpe" else ""
    out = tmp_path / "out"
    build(load_recipe(_project(tmp_path / "src", extra, tokenizer)), out, workers=1, progress=False)
    vocab = open_dataset(out).vocabulary
    want = _train_bincount(out)
    assert vocab.counts.tolist() == want.tolist()
    assert vocab.counts[vocab.id_of("end")] == open_dataset(out).split("train").num_documents
    assert verify(out).ok


HELD_OUT_SOURCE = """
[[sources]]
kind = "text"
paths = "held/*.txt"
document = "paragraph"
fixed_split = "validation"
"""


@pytest.mark.parametrize(
    ("tokenizer", "extra", "held_out"),
    [
        ("words", '[vocabulary]\nmin_count = 3\ncap = CAP\n[[clean]]\nkind = "dedupe"\n', False),
        ("bpe", '[vocabulary]\ncap = CAP\n[encode]\nprepend_begin = true\n[[clean]]\nkind = "dedupe"\n', False),
        ("words", "[vocabulary]\ncap = CAP\n[splits]\nexclude_overlap_from_train = true\n", True),
    ],
    ids=["words-dedupe-unknowns", "bpe-dedupe", "words-held-out-overlap"],
)
def test_vocabulary_count_column_with_documents_dropped_and_from_the_cache(
    tmp_path: Path, tokenizer: str, extra: str, held_out: bool
) -> None:
    """The ``count`` column (taken from the corpus piece counts, not the shards) is still np.bincount
    over the train shards when documents are dropped after ingest (exact duplicates, train documents
    a held-out source also holds), when some pieces are unknown, and in a rebuild whose parts and
    counts come from the cache with another vocabulary."""
    src = tmp_path / "src"
    recipe_path = _project(src, extra.replace("CAP", "320") + (HELD_OUT_SOURCE if held_out else ""), tokenizer)
    shutil.copy(src / "corpus" / "log-000.txt", src / "corpus" / "log-009.txt")  # every paragraph twice
    if held_out:
        (src / "held").mkdir()
        shutil.copy(src / "corpus" / "log-001.txt", src / "held" / "copy.txt")
    out = tmp_path / "out"
    first = build(load_recipe(recipe_path), out, workers=1, progress=False)
    dropped = first.manifest["summary"]["duplicates_dropped"] + first.manifest["summary"]["train_overlap"]["removed"]
    assert dropped > 0, "the corpus was meant to drop documents after ingest"
    assert open_dataset(out).vocabulary.counts.tolist() == _train_bincount(out).tolist()
    text = recipe_path.read_text(encoding="utf-8")
    recipe_path.write_text(text.replace("cap = 320", "cap = 290"), encoding="utf-8")
    again = build(load_recipe(recipe_path), out, workers=1, progress=False)
    assert again.parts_reused == again.parts_total and again.fingerprint != first.fingerprint
    assert open_dataset(out).vocabulary.counts.tolist() == _train_bincount(out).tolist()
    assert verify(out).ok


def test_unknown_rate_has_one_definition_in_summary_and_report(tmp_path: Path) -> None:
    """The build summary and the report give the same unknown rate per split: unknown tokens over
    content tokens (begin/end markers left out), recomputed here from the shards."""
    from seqpipe.report import corpus_report

    out = tmp_path / "out"
    extra = "[vocabulary]\nmin_count = 3\n[encode]\nprepend_begin = true\n"
    result = build(load_recipe(_project(tmp_path / "src", extra)), out, workers=1, progress=False)
    ds = open_dataset(out)
    report = corpus_report(ds, progress=False)
    unk = ds.vocabulary.unknown_id
    for name in ds.splits:
        split = ds.split(name)
        ids = np.concatenate([np.asarray(c) for c in split.stream.chunks])
        content = len(ids) - 2 * split.num_documents  # one begin and one end marker per document
        want = int(np.count_nonzero(ids == unk)) / content
        assert want > 0, "min_count was meant to leave unknown tokens"
        assert result.manifest["summary"]["splits"][name]["unknown_rate"] == pytest.approx(want, rel=1e-12)
        assert report["splits"][name]["unknown_rate"] == pytest.approx(want, rel=1e-12)


def test_a_build_served_from_the_cache_reports_nothing_read(tmp_path: Path) -> None:
    """A rebuild whose parts all come from the cache reads no input bytes and says so, instead of
    a read rate for bytes it never read; the first build reports what it read."""
    recipe = load_recipe(_project(tmp_path / "src", ""))
    first = build(recipe, tmp_path / "out", workers=1, progress=False)
    assert first.bytes_read == first.input_bytes > 0
    again = build(recipe, tmp_path / "out", workers=1, progress=False)
    assert again.parts_reused == again.parts_total and again.bytes_read == 0
    line = next(line for line in again.summary_lines() if line.startswith("inputs"))
    assert "nothing read" in line and "MB/s" not in line


def test_environment_is_recorded_and_keys_the_part_cache(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The manifest records the Unicode and library versions; a cached part made under another
    Unicode version (or regex version) is not reused, and the fingerprint changes with it."""
    import unicodedata

    import regex

    from seqpipe._environment import environment
    from seqpipe.formats import ENVIRONMENT_KEYS

    assert sorted(environment()) == sorted(ENVIRONMENT_KEYS)
    recipe = load_recipe(_project(tmp_path / "src", ""))
    first = build(recipe, tmp_path / "out", workers=1, progress=False)
    assert first.manifest["environment"] == environment()
    assert first.manifest["environment"]["unicode"] == unicodedata.unidata_version
    monkeypatch.setattr(unicodedata, "unidata_version", "0.0.1-test")
    again = build(recipe, tmp_path / "out", workers=1, progress=False)
    assert again.parts_reused == 0 < again.parts_total
    assert again.manifest["environment"]["unicode"] == "0.0.1-test"
    assert again.fingerprint != first.fingerprint
    monkeypatch.setattr(regex, "__version__", "0.0.2-test")
    assert build(recipe, tmp_path / "out", workers=1, progress=False).parts_reused == 0
    assert verify(tmp_path / "out").ok


def test_fingerprint_does_not_depend_on_where_the_recipe_sits(tmp_path: Path) -> None:
    """The same recipe with absolute globs, saved in two folders, over the same files gives the
    same fingerprint: inputs are named relative to their glob's fixed directory, not the recipe."""
    from conftest import write_corpus

    write_corpus(tmp_path / "data", files=2, paragraphs=10)
    text = f'[[sources]]\nkind = "text"\npaths = "{(tmp_path / "data" / "corpus").as_posix()}/*.txt"\n'
    text += 'document = "paragraph"\n[tokenizer]\nkind = "words"\n'
    prints = []
    for where in ("a", "b/deeper/still"):
        folder = tmp_path / where
        folder.mkdir(parents=True)
        (folder / "recipe.toml").write_text(text, encoding="utf-8")
        result = build(load_recipe(folder / "recipe.toml"), folder / "out", workers=1, progress=False)
        assert [i["path"] for i in result.manifest["inputs"]] == ["log-000.txt", "log-001.txt"]
        prints.append(result.fingerprint)
    assert prints[0] == prints[1]


@pytest.mark.parametrize(
    ("pattern", "base"),
    [
        ("logs/2026/*.txt", "logs/2026"),
        ("*.txt", "."),
        ("/srv/x/**/a?.txt", "/srv/x"),
        ("a.txt", "."),
        ("d/a.txt", "d"),
    ],
)
def test_glob_base_is_the_fixed_directory_part(pattern: str, base: str) -> None:
    """glob_base keeps the leading components without a wildcard, never the file component."""
    from seqpipe.sources.base import glob_base

    assert glob_base(pattern) == base


def test_small_input_read_equals_the_file_bytes(tmp_path: Path) -> None:
    """_read_small returns a file's bytes whether it is as listed, grew or shrank since."""
    from seqpipe._build import _read_small

    f = tmp_path / "a.txt"
    for body in (b"", b"x", b"ferry log\n" * 300):
        f.write_bytes(body)
        for listed in (0, max(len(body) - 5, 0), len(body), len(body) + 9):
            data, st = _read_small(str(f), listed)
            assert data == body and st.st_size == len(body)


def test_inputs_manifest_text_kept_in_the_cache_is_used_only_for_the_same_inputs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A rebuild takes the inputs' manifest texts from the cache (inputs.text) instead of writing
    them again; a damaged file or changed inputs make them anew. Every manifest is byte for byte
    the one a build without a cache writes (the reference: a fresh build elsewhere)."""
    import seqpipe._build as driver

    src = tmp_path / "src"
    recipe_path = _project(src, "[vocabulary]\ncap = 300\n")
    made: list[int] = []
    real = driver.flat_texts
    monkeypatch.setattr(driver, "flat_texts", lambda e: made.append(len(e)) or real(e))

    def fresh_manifest(name: str) -> bytes:
        build(load_recipe(recipe_path), tmp_path / name, workers=1, progress=False)
        return (tmp_path / name / "manifest.json").read_bytes()

    out = tmp_path / "out"
    build(load_recipe(recipe_path), out, workers=1, progress=False)
    kept = out / ".seqpipe" / "cache" / "inputs.text"
    assert kept.is_file() and [n for n in made if n > 1] == [2]  # two inputs, written once
    recipe_path.write_text(recipe_path.read_text(encoding="utf-8").replace("cap = 300", "cap = 280"), encoding="utf-8")
    made.clear()
    build(load_recipe(recipe_path), out, workers=1, progress=False)
    assert [n for n in made if n > 1] == []  # taken from the cache
    assert (out / "manifest.json").read_bytes() == fresh_manifest("ref1")
    data = bytearray(kept.read_bytes())
    data[-5] ^= 1  # a damaged text fails its hash
    kept.write_bytes(bytes(data))
    made.clear()
    build(load_recipe(recipe_path), out, workers=1, progress=False)
    assert [n for n in made if n > 1] == [2]
    assert (out / "manifest.json").read_bytes() == fresh_manifest("ref2")
    with (src / "corpus" / "log-000.txt").open("a", encoding="utf-8") as fh:
        fh.write("\nthe ferry waited for the tide\n")
    made.clear()
    build(load_recipe(recipe_path), out, workers=1, progress=False)
    assert [n for n in made if n > 1] == [2]
    assert (out / "manifest.json").read_bytes() == fresh_manifest("ref3")
    assert verify(out).ok
