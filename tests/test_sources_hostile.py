"""Sources in a hostile file tree and with hostile content: loops, special files, blank documents."""

from __future__ import annotations

import ast
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from seqpipe import build
from seqpipe.errors import SourceError
from seqpipe.recipe import parse_recipe
from seqpipe.sources.base import ReadStats
from seqpipe.sources.jsonl import JsonlSource
from seqpipe.sources.text import TextSource

REPO = Path(__file__).resolve().parent.parent

RECIPE = """
[[sources]]
kind = "text"
paths = "logs/**/*.txt"
document = "line"{extra}
[tokenizer]
kind = "words"
[shards]
tokens = 500
"""


def run_python(code: str, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    """``code`` run by this interpreter in a child process with the repository importable."""
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return subprocess.run(
        [sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True, timeout=timeout, env=env
    )


def make_loop_tree(root: Path) -> None:
    """logs/a.txt, logs/deck/b.txt and three symlinks back up the tree (a branching loop)."""
    (root / "logs" / "deck").mkdir(parents=True)
    (root / "logs" / "a.txt").write_text("stern line\n")
    (root / "logs" / "deck" / "b.txt").write_text("bow line\n")
    for name in ("up1", "up2"):
        (root / "logs" / "deck" / name).symlink_to("..")
    (root / "logs" / "self").symlink_to(".")


def test_a_branching_symlink_loop_is_walked_once_and_listed(tmp_path: Path) -> None:
    """A glob over a tree with a branching symlink loop ends, yields each file once, and lists every loop."""
    make_loop_tree(tmp_path)
    # In a child with a deadline: a walk that follows the loop would not end for hours.
    done = run_python(
        f"""
        from pathlib import Path
        from seqpipe.sources.text import TextSource
        got = TextSource(paths="logs/**/*.txt").resolve_all(Path({str(tmp_path)!r}))
        print(sorted(str(p) for p in got.files))
        print(sorted(got.skipped))
        """,
        timeout=60,
    )
    assert done.returncode == 0, done.stderr
    files, skipped = done.stdout.splitlines()
    assert files == repr(sorted(str(tmp_path / p) for p in ("logs/a.txt", "logs/deck/b.txt")))
    loops = ast.literal_eval(skipped)
    assert sorted(p for p, what in loops if what == "symlink loop") == [
        "deck/up1",
        "deck/up2",
        "self",
    ]  # relative to the glob base logs/


def test_symlink_loops_refused_when_asked(tmp_path: Path) -> None:
    """on_special_file = "error" refuses a symlink loop with an error naming the link."""
    make_loop_tree(tmp_path)
    with pytest.raises(SourceError, match=r"deck/up1.*symlink loop"):
        TextSource(paths="logs/**/*.txt", on_special_file="error").resolve(tmp_path)


def make_special_tree(root: Path) -> None:
    """Regular files plus a FIFO, a dangling symlink and a directory whose names match ``*.txt``."""
    (root / "logs").mkdir(parents=True)
    (root / "logs" / "a.txt").write_text("stern line\nbow line\n")
    os.mkfifo(root / "logs" / "pipe.txt")
    (root / "logs" / "gone.txt").symlink_to("nowhere.txt")
    (root / "logs" / "old.txt").mkdir()


def test_special_files_are_skipped_counted_and_named(tmp_path: Path) -> None:
    """A FIFO, a dangling symlink and a directory that match the glob are named in the manifest and summary."""
    make_special_tree(tmp_path)
    res = build(parse_recipe(RECIPE.format(extra=""), tmp_path), tmp_path / "out", workers=1, progress=False)
    assert res.manifest["summary"]["skipped_paths"] == [
        {"path": "gone.txt", "what": "dangling symlink"},
        {"path": "old.txt", "what": "directory"},
        {"path": "pipe.txt", "what": "fifo"},
    ]
    assert [i["path"] for i in res.manifest["inputs"]] == ["a.txt"]  # relative to the glob base logs/
    lines = "\n".join(res.summary_lines())
    assert "pipe.txt (fifo" in lines and "gone.txt (dangling symlink" in lines


def test_a_symlink_and_its_target_both_matched_are_one_input(tmp_path: Path) -> None:
    """A file the glob matches by its own name and through a symlink is read once, under the
    name sorted first (the docstring of _build._input_files: a file two matches name is one input)."""
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "b.txt").write_text("".join(f"ferry crossing {i} left at dawn\n" for i in range(40)))
    (tmp_path / "logs" / "a.txt").symlink_to("b.txt")
    res = build(parse_recipe(RECIPE.format(extra=""), tmp_path), tmp_path / "out", workers=1, progress=False)
    assert [i["path"] for i in res.manifest["inputs"]] == ["a.txt"]
    assert res.manifest["summary"]["read"]["documents"] == 40


def test_a_walk_stamps_plain_files_as_change_stamp_does_and_leaves_symlinks_to_be_asked(tmp_path: Path) -> None:
    """glob_local(stamped=True) gives each plain file the stamp filesystem.change_stamp gives it,
    and None for a file matched through a symlink (its identity and stamp are asked again)."""
    from seqpipe.filesystem import change_stamp, glob_local

    (tmp_path / "logs" / "deep").mkdir(parents=True)
    (tmp_path / "logs" / "b.txt").write_text("ferry left\n")
    (tmp_path / "logs" / "deep" / "c.txt").write_text("ferry came back late\n")
    (tmp_path / "logs" / "a.txt").symlink_to("b.txt")
    got = glob_local(tmp_path, "logs/**/*.txt", stamped=True)
    assert list(got.files) == ["logs/a.txt", "logs/b.txt", "logs/deep/c.txt"]
    assert list(got.stamps) == [None, change_stamp(tmp_path / "logs/b.txt"), change_stamp(tmp_path / "logs/deep/c.txt")]
    assert glob_local(tmp_path, "logs/**/*.txt").stamps == ()


def test_one_glob_resolved_as_str_lists_what_the_general_path_lists(tmp_path: Path) -> None:
    """resolve_all(as_str=True) of one glob (the one-walk path) gives the same files (as str),
    names, order and stamps as the general path (as_str=False, and a second glob that adds nothing)."""
    from seqpipe.filesystem import change_stamp

    for rel in ("logs/b-c.txt", "logs/b/a.txt", "logs/b/z.txt", "logs/a.txt", "logs/deep/er/x.txt"):
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_text("ferry\n")
    fast = TextSource(paths="logs/**/*.txt").resolve_all(tmp_path, as_str=True, stamped=True)
    general = TextSource(paths=["logs/**/*.txt", "logs/a.txt"]).resolve_all(tmp_path, stamped=True)
    assert fast.files == [str(p) for p in general.files]
    assert fast.names == general.names == ("a.txt", "b-c.txt", "b/a.txt", "b/z.txt", "deep/er/x.txt")
    assert list(fast.stamps) == [change_stamp(p) for p in general.files] == list(general.stamps)


def test_a_plain_file_two_sources_match_is_one_input(tmp_path: Path) -> None:
    """A plain file (no symlink) that a second source's glob matches again is read once, by the
    first source (the check one walk of one source may skip)."""
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "b.txt").write_text("".join(f"ferry crossing {i} left at dawn\n" for i in range(40)))
    recipe = RECIPE.format(extra="") + '[[sources]]\nkind = "text"\npaths = "logs/b.txt"\ndocument = "line"\n'
    res = build(parse_recipe(recipe, tmp_path), tmp_path / "out", workers=1, progress=False)
    assert [i["path"] for i in res.manifest["inputs"]] == ["b.txt"]
    assert res.manifest["summary"]["read"]["documents"] == 40


def test_special_files_refused_when_asked(tmp_path: Path) -> None:
    """on_special_file = "error" stops the build naming the first special file the glob matches."""
    make_special_tree(tmp_path)
    recipe = parse_recipe(RECIPE.format(extra='\non_special_file = "error"'), tmp_path)
    with pytest.raises(SourceError, match=r"gone\.txt.*dangling symlink"):
        build(recipe, tmp_path / "out", workers=1, progress=False)


def test_blank_records_are_counted_at_read(tmp_path: Path) -> None:
    """JSON Lines records whose text is blank are dropped and counted in summary.read.blank_skipped."""
    (tmp_path / "logs").mkdir()
    lines = ['{"text": "ferry left at dawn"}', '{"text": "  \\t "}', '{"text": "\\r\\n"}', '{"text": "fog"}']
    (tmp_path / "logs" / "a.jsonl").write_text("\n".join(lines) + "\n")
    recipe = (
        RECIPE.replace('kind = "text"', 'kind = "jsonl"').replace("*.txt", "*.jsonl").replace('document = "line"', "")
    )
    res = build(parse_recipe(recipe.format(extra=""), tmp_path), tmp_path / "out", workers=1, progress=False)
    read = res.manifest["summary"]["read"]
    assert (read["documents"], read["blank_skipped"]) == (2, 2)


def test_cleaning_that_blanks_a_document_drops_it_counted(tmp_path: Path) -> None:
    """A paragraph of only NBSP and U+3000 is dropped (counted) after collapse_whitespace, not kept end-marker-only."""
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "a.txt").write_text("ferry left\n\n\u00a0\u3000\u00a0\n\nfog lifted\n", encoding="utf-8")
    recipe = RECIPE.replace('document = "line"', 'document = "paragraph"') + '[[clean]]\nkind = "collapse_whitespace"\n'
    res = build(parse_recipe(recipe.format(extra=""), tmp_path), tmp_path / "out", workers=1, progress=False)
    summary = res.manifest["summary"]
    assert summary["read"]["documents"] == 3
    assert summary["dropped"] == {"blank_after_cleaning": 1}
    assert sum(s["documents"] for s in res.manifest["splits"].values()) == 2


@pytest.mark.parametrize(("line_ends", "expected"), [("normalize", "deck\nhold"), ("keep", "deck\r\nhold")])
def test_line_ends_keep_leaves_carriage_returns(tmp_path: Path, line_ends: str, expected: str) -> None:
    """line_ends = "keep" reads CRLF inside a document as written (text and JSON Lines); the default gives LF."""
    (tmp_path / "a.txt").write_bytes(b"deck\r\nhold\r\n\r\nstern\r\n")
    (tmp_path / "a.jsonl").write_bytes(b'{"text": "deck\\r\\nhold"}\n{"text": "stern"}\n')
    for source in (
        TextSource(paths="a.txt", document="paragraph", line_ends=line_ends),
        JsonlSource(paths="a.jsonl", line_ends=line_ends),
    ):
        docs = [d for batch in source.documents(tmp_path, ReadStats()) for d in batch.to_pylist()]
        assert docs == [expected, "stern"], type(source).__name__


# Alternatives that match the same text under a repetition: exponential backtracking on a run of
# 'a' then 'b' (common practice). The textbook "(a+)+$" is not used: the regex module's own
# checks end it at once (tried on regex 2026.11.19), while this one runs for hours on 40 letters.
CATASTROPHIC = "(a|a)+$"


@pytest.mark.parametrize(
    ("section", "step"),
    [
        (f'[[clean]]\nkind = "replace"\npattern = "{CATASTROPHIC}"\n', "clean[0] replace"),
        (f'[tokenizer]\nkind = "words"\npattern = "{CATASTROPHIC}"\n', "tokenizer words"),
        (
            '[tokenizer]\nkind = "bpe"\nchunking = "custom"\nchunk_regex = "(?:a|a)+$"\n[vocabulary]\ncap = 300\n',
            "tokenizer bpe chunking",
        ),
    ],
)
def test_a_backtracking_pattern_fails_with_exit_3_naming_document_step_and_pattern(
    tmp_path: Path, section: str, step: str
) -> None:
    """A catastrophic pattern on a 41-character line stops the build (exit 3) naming file, document, step, pattern."""
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "a.txt").write_text("harbour calm\n" + "a" * 40 + "b\n")
    recipe = RECIPE.format(extra="")
    if section.startswith("[tokenizer]"):
        recipe = recipe.replace('[tokenizer]\nkind = "words"\n', section)
    else:
        recipe = recipe.replace("[tokenizer]", section + "[tokenizer]")
    (tmp_path / "recipe.toml").write_text(recipe)
    # The limit is lowered in the child so the test takes about a second, not the default 10 s.
    done = run_python(
        f"""
        import sys
        from seqpipe import _patterns
        from seqpipe.cli import main
        _patterns.SECONDS_PER_DOCUMENT = 0.5
        sys.exit(main(["build", {str(tmp_path / "recipe.toml")!r}, "-o", {str(tmp_path / "out")!r}, "--workers", "1"]))
        """,
        timeout=120,
    )
    assert done.returncode == 3, done.stderr
    pattern = "(?:a|a)+$" if "bpe" in step else CATASTROPHIC
    assert "logs/a.txt" in done.stderr and "document 1 " in done.stderr
    assert step in done.stderr and repr(pattern) in done.stderr
    assert "Traceback" not in done.stderr


@pytest.mark.slow
def test_ingest_memory_of_a_highly_compressed_input_is_bounded_by_the_part_size(tmp_path: Path) -> None:
    """Ingesting a 10 MB gzip of 200 MB of short lines in 8 MB parts keeps peak RSS growth bounded by the parts."""
    part = 8 << 20
    # In a child: ru_maxrss is the process's peak, and this process's peak is the test run's.
    done = run_python(
        f"""
        import gc, gzip, resource
        from pathlib import Path
        from seqpipe._build import plan_build
        from seqpipe.ingest import ingest_part
        from seqpipe.recipe import parse_recipe
        root = Path({str(tmp_path)!r})
        (root / "logs").mkdir()
        lines = b"".join(b"ferry %d north calm\\n" % i for i in range(1000)) * 64
        with gzip.open(root / "logs" / "big.txt.gz", "wb", compresslevel=1) as f:
            for _ in range((200 << 20) // len(lines)):
                f.write(lines)
        text = '[[sources]]\\nkind = "text"\\npaths = "logs/*.gz"\\ndocument = "line"\\n'
        recipe = parse_recipe(text + '[tokenizer]\\nkind = "words"\\n', root)
        plan = plan_build(recipe, root / "cache", {part})
        gc.collect()
        base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss << 10  # KiB on Linux
        docs = sum(ingest_part(task).documents for task in plan.tasks)
        print(len(plan.tasks), docs, (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss << 10) - base)
        """,
        timeout=600,
    )
    assert done.returncode == 0, done.stderr
    parts, docs, growth = map(int, done.stdout.split())
    assert parts >= 20 and docs > 9_000_000
    # A part of 20-byte lines costs about 16 times its bytes (per-document arrays, pieces and the
    # Python strings of a batch on each ingest thread); the whole stream as one part cost 1.7 GB here.
    assert growth < 40 * part, f"peak RSS grew by {growth} bytes over {parts} parts"


def test_max_input_bytes_refuses_a_stream_that_decompresses_too_far(tmp_path: Path) -> None:
    """max_input_bytes stops planning a compressed input once it decompresses past the limit, naming the file."""
    import gzip

    (tmp_path / "logs").mkdir()
    (tmp_path / "logs" / "a.txt.gz").write_bytes(gzip.compress(b"calm sea\n" * 200_000))
    for document in ("line", "file"):
        source = TextSource(paths="logs/*.gz", document=document, max_input_bytes=1 << 20)
        with pytest.raises(SourceError, match=r"a\.txt\.gz: decompresses to more than max_input_bytes = 1048576"):
            source.plan(tmp_path / "logs" / "a.txt.gz", 1 << 16)
    assert (
        len(
            TextSource(paths="x", document="line", max_input_bytes=2 << 20).plan(
                tmp_path / "logs" / "a.txt.gz", 1 << 16
            )
        )
        > 1
    )
    (tmp_path / "logs" / "a.jsonl.gz").write_bytes(gzip.compress(b'{"text": "fog"}\n' * 200_000))
    with pytest.raises(SourceError, match=r"a\.jsonl\.gz: decompresses to more than"):
        JsonlSource(paths="x", max_input_bytes=1 << 20).plan(tmp_path / "logs" / "a.jsonl.gz", 1 << 16)


@pytest.mark.parametrize("codec", ["gzip", "zstd"])
def test_compressed_parts_read_as_the_whole_stream(tmp_path: Path, codec: str) -> None:
    """Paragraphs (CRLF, blank runs) and JSON Lines cut in the decompressed stream read exactly as one part does."""
    import random

    import pyarrow as pa

    rnd = random.Random(5)
    seps = [b"\n\n", b"\r\n\r\n", b"\n \n\t\n", b"\r\r"]
    body = b"".join(b"tide %d\r\nrope %d" % (i, rnd.randint(0, 9)) + rnd.choice(seps) for i in range(3000))
    records = b"".join(b'{"text": "dock %d"}\n' % i for i in range(3000))
    suffix = {"gzip": ".gz", "zstd": ".zst"}[codec]
    for name, data in (("a.txt", body), ("a.jsonl", records)):
        with pa.output_stream(str(tmp_path / (name + suffix)), compression=codec) as out:
            out.write(data)
    for source, name in ((TextSource(paths="x", document="paragraph"), "a.txt"), (JsonlSource(paths="x"), "a.jsonl")):
        path = tmp_path / (name + suffix)
        whole = [d for a in source.read(path, source.plan(path, 1 << 30)[0], ReadStats()) for d in a.to_pylist()]
        parts = source.plan(path, 997)
        assert len(parts) > 10
        cut = [d for p in parts for a in source.read(path, p, ReadStats()) for d in a.to_pylist()]
        assert cut == whole and len(whole) == 3000


def test_skipped_paths_do_not_depend_on_where_the_recipe_sits(tmp_path: Path) -> None:
    """An absolute glob's skipped matches are named relative to the glob base, as inputs are, so
    two recipe folders record the same names (and the same fingerprint)."""
    make_special_tree(tmp_path)
    pattern = f"{tmp_path.as_posix()}/logs/*.txt"
    names = [TextSource(paths=pattern).resolve_all(root).skipped for root in (tmp_path / "a", tmp_path / "b" / "c")]
    assert names[0] == names[1] and ("pipe.txt", "fifo") in names[0]
