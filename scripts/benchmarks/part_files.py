"""Many small files and the parts cache: build speed against one file, cached rebuilds, cache size.

Inputs: ``_shapes.write_many_small_files`` (one document per file, nested directories) and the
same documents as paragraphs of one file; ``_corpus.write_corpus`` for the large corpus. Every
ratio compares two builds of this run on this machine; the inputs are read once before timing
so both sides read them from the page cache, and synced to disk, so no build pays for the
writeback of inputs written just before it.
"""

from __future__ import annotations

import os
import shutil
import time
from collections.abc import Iterator
from pathlib import Path

from _corpus import write_corpus
from _shapes import write_many_small_files
from common import Measure

from seqpipe import build
from seqpipe.recipe import Recipe, parse_recipe

MB = 1_000_000
RECIPE = """
[dataset]
name = "bench-files"
[[sources]]
kind = "text"
paths = "{paths}"
document = "paragraph"
[[clean]]
kind = "lowercase"
[tokenizer]
kind = "words"
[vocabulary]
cap = {cap}
[shards]
tokens = 8388608
"""


def _recipe(root: Path, paths: str, cap: int = 0) -> Recipe:
    return parse_recipe(RECIPE.format(paths=paths, cap=cap), root)


def _warm(root: Path) -> int:
    """Read every input once (page cache); return the bytes."""
    return sum(len(p.read_bytes()) for p in sorted(root.rglob("*.txt")))


def _fresh(recipe: Recipe, out: Path, repeat: int) -> float:
    """Best wall time of ``repeat`` builds from nothing (output and cache removed before each)."""
    best = float("inf")
    for _ in range(repeat):
        shutil.rmtree(out, ignore_errors=True)
        t0 = time.perf_counter()
        build(recipe, out, progress=False)
        best = min(best, time.perf_counter() - t0)
    return best


def _cached(root: Path, paths: str, out: Path, repeat: int) -> tuple[float, int, int]:
    """Best wall time of rebuilds of ``out`` with only the vocabulary cap changed (every part from
    the cache), and the parts reused / total of the last."""
    best, reused, total = float("inf"), 0, 0
    for i in range(repeat):
        recipe = _recipe(root, paths, cap=1000 + i)
        t0 = time.perf_counter()
        result = build(recipe, out, progress=False)
        best = min(best, time.perf_counter() - t0)
        reused, total = result.parts_reused, result.parts_total
    return best, reused, total


def _cache_figures(out: Path) -> tuple[int, int]:
    """Bytes and number of files of the build's cache (parts, input hashes, input cuts)."""
    files = [p for p in (out / ".seqpipe" / "cache").rglob("*") if p.is_file()]
    return sum(p.stat().st_size for p in files), len(files)


def _one_file(many: Path, one: Path) -> None:
    """The documents of the many-file tree, in its sorted order, as paragraphs of one file."""
    docs = [p.read_bytes().strip() for p in sorted(many.rglob("*.txt"))]
    one.mkdir(parents=True, exist_ok=True)
    (one / "all.txt").write_bytes(b"\n\n".join(d for d in docs if d) + b"\n")


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    files, big = (200, 2 * MB) if quick else (10_000, 100 * MB)
    repeat = 1 if quick else 3
    many = workdir / "many"
    input_many = write_many_small_files(many / "notes", files, 2500, seed=11)
    _one_file(many / "notes", workdir / "one" / "notes")
    write_corpus(workdir / "large" / "notes", big, files=4)
    for root in (many, workdir / "one", workdir / "large"):
        _warm(root)
    # the inputs were just written: flush them now, or their writeback (130 MB) runs under the
    # first builds timed (the many-file ones) and slows their own fsyncs, not the later ones'
    os.sync()

    paths = "notes/**/*.txt"
    t_many = _fresh(_recipe(many, paths), workdir / "out-many", repeat)
    t_one = _fresh(_recipe(workdir / "one", paths), workdir / "out-one", repeat)
    yield Measure(
        "build.many_files_vs_one_file",
        t_one / t_many,
        0.5,
        f"{files} files ({input_many / MB:.1f} MB) {t_many:.2f} s vs one file {t_one:.2f} s",
    )

    c_many, reused_many, total_many = _cached(many, paths, workdir / "out-many", repeat)
    large = workdir / "large"
    t_large = _fresh(_recipe(large, paths), workdir / "out-large", repeat)
    c_large, reused_large, total_large = _cached(large, paths, workdir / "out-large", repeat)
    r_many, r_large = t_many / c_many, t_large / c_large
    yield Measure(
        "build.cached_vs_fresh",
        min(r_many, r_large),
        10,
        f"worse of: {files} files {r_many:.1f}x ({t_many:.2f} s fresh, {c_many:.3f} s cached, "
        f"{reused_many}/{total_many} parts reused); {big // MB} MB {r_large:.1f}x ({t_large:.2f} s fresh, "
        f"{c_large:.3f} s cached, {reused_large}/{total_large} parts reused)",
    )

    input_large = _warm(large)
    judged = []
    details = []
    for name, out, size in (("files", workdir / "out-many", input_many), ("large", workdir / "out-large", input_large)):
        cache_bytes, cache_files = _cache_figures(out)
        per_mb = cache_files / (size / MB)
        judged.append(max(cache_bytes / size, 1.5 * per_mb))
        details.append(f"{name}: {cache_bytes / size:.2f} x input, {cache_files} files ({per_mb:.2f} per MB)")
    yield Measure(
        "build.cache_bytes_vs_input",
        max(judged),
        1.5,
        "judged: the larger of cache bytes / input bytes and 1.5 x cache files per MB of input; " + "; ".join(details),
        higher_is_better=False,
    )
