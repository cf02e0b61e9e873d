"""The driver's peak memory does not grow with the documents: dedupe, near_dedupe and split
bookkeeping run in hash-partitioned tasks (seqpipe/_dedupe.py), so the driver holds figures
per part.

Each build runs as ``build(..., workers=2)`` in its own interpreter, which reports the peak of
its own process's anonymous memory (RssAnon of /proc/self/status, sampled every 5 ms by a
thread; the spawned worker is a separate process and not counted). Not VmHWM or ru_maxrss:
both count the pages of memory-mapped files, and hashing an input or a documents table maps the
whole file, so they grow with the file sizes by page cache the kernel can drop at any time,
not by what the driver holds (VmHWM is shown beside; so is the spawned worker's ru_maxrss from
RUSAGE_CHILDREN, which counts from its fork). Linux also keeps ru_maxrss across exec, so
getrusage(RUSAGE_SELF) in a child would report its parent's size at fork.

With workers=2 the driver also runs tasks (seqpipe's executor lets this process take tasks
beside the spawned one), so its peak includes one task's memory: per part, per partition and
per shard, all bounded. Shards hold 1M tokens, so both sizes fill whole shards and the
comparison is of documents, not of a half-empty shard against full ones (a shard task's memory
grows with ``shards.tokens``, not with the corpus).

Inputs are invented words (``_corpus.invent_words``), one document per line: short lines of
3-8 words (about 5% planted exact repeats) for the document count, lines of 40-120 words with
planted near-copies (about 3%: a copy of an earlier line with one word changed) for near_dedupe.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Final

import numpy as np
from _corpus import invent_words
from common import Measure

MB: Final = 1 << 20
PART_BYTES: Final = 16 << 20  # the build's default (seqpipe._build.PART_BYTES)
CHUNK_LINES: Final = 100_000
# Builds per size of the document-count line, the median taken: the driver also runs tasks, so its
# peak includes whichever task it took last (one build of the same corpus moved 109-148 MB between runs)
DOC_BUILDS: Final = 3

_DRIVER = """
import json, resource, sys, threading, time
from pathlib import Path
from seqpipe import build
from seqpipe.recipe import load_recipe

def status(name):
    line = [l for l in Path("/proc/self/status").read_text().splitlines() if l.startswith(name + ":")]
    return int(line[0].split()[1])

peak = [0]
def sample():
    while True:
        peak[0] = max(peak[0], status("RssAnon"))
        time.sleep(0.005)

threading.Thread(target=sample, daemon=True).start()
result = build(load_recipe(sys.argv[1]), sys.argv[2], workers=2, progress=False, part_bytes=int(sys.argv[3]))
peak[0] = max(peak[0], status("RssAnon"))
summary = result.manifest["summary"]
print(json.dumps({"driver_kib": peak[0], "hwm_kib": status("VmHWM"), "seconds": result.seconds,
                  "worker_kib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss,
                  "duplicates": summary["duplicates_dropped"],
                  "near": summary["near_duplicates_dropped"]}))
"""

RECIPE: Final = """
[[sources]]
kind = "text"
paths = "corpus/*.txt"
document = "line"
{steps}
[tokenizer]
kind = "words"
[splits]
train = 0.9
validation = 0.05
test = 0.05
[shards]
tokens = 1048576
"""
EXACT: Final = '\n[[clean]]\nkind = "dedupe"\n'
NEAR: Final = '\n[[clean]]\nkind = "near_dedupe"\n'


def _lines(rng: np.random.Generator, words: np.ndarray, count: int, shortest: int, longest: int) -> np.ndarray:
    """(count, longest) word indices and each line's length."""
    lengths = rng.integers(shortest, longest + 1, size=count)
    index = rng.integers(0, len(words), size=(count, longest))
    return np.column_stack([lengths, index])


def _text(spaced: np.ndarray, ended: np.ndarray, table: np.ndarray) -> str:
    """Lines of words (a space between words, a line break after each) in one join; ``spaced``
    and ``ended`` are the words followed by a space and by a line break."""
    lengths, index = table[:, 0], table[:, 1:]
    inside = np.arange(index.shape[1])[None, :] < lengths[:, None]
    last = np.arange(index.shape[1])[None, :] == (lengths - 1)[:, None]
    pieces = np.where(last[inside], ended[index[inside]], spaced[index[inside]])
    return "".join(pieces.tolist())


def write_lines(path: Path, documents: int, *, shortest: int, longest: int, near: bool, seed: int) -> int:
    """``documents`` lines into ``path``; about 5% exact repeats of an earlier line of the same
    chunk, or (``near``) about 3% near-copies of one (one word changed). Returns the bytes."""
    rng = np.random.default_rng(seed)
    words = np.array(invent_words(20_000, 7), dtype=object)
    spaced, ended = words + " ", words + "\n"
    path.parent.mkdir(parents=True, exist_ok=True)
    written = 0
    with open(path, "w", encoding="utf-8") as fh:
        for start in range(0, documents, CHUNK_LINES):
            count = min(CHUNK_LINES, documents - start)
            table = _lines(rng, words, count, shortest, longest)
            copies = np.flatnonzero(rng.random(count) < (0.03 if near else 0.05))
            copies = copies[copies > 0]
            table[copies] = table[rng.integers(0, copies)]  # each copies an earlier line
            if near and len(copies):  # one word of each copy changed
                at = 1 + rng.integers(0, table[copies, 0])
                table[copies, at] = rng.integers(0, len(words), size=len(copies))
            text = _text(spaced, ended, table)
            fh.write(text)
            written += len(text.encode())
    return written


def driver_peak(root: Path, steps: str, part_bytes: int) -> dict[str, float]:
    """Build ``root``'s corpus with ``workers=2`` in its own interpreter; the driver's figures."""
    (root / "recipe.toml").write_text(RECIPE.format(steps=steps), encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[2]), SEQPIPE_INGEST_THREADS="1")
    done = subprocess.run(
        [sys.executable, "-c", _DRIVER, str(root / "recipe.toml"), str(root / "out"), str(part_bytes)],
        env=env,
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode:
        raise RuntimeError(f"build subprocess failed ({done.returncode}):\n{done.stderr[-3000:]}")
    report: dict[str, float] = json.loads(done.stdout.strip().splitlines()[-1])
    return report


def _doc_line(small: int, big: int, workdir: Path, part_bytes: int) -> Measure:
    sizes = {}
    peaks: dict[int, str] = {}
    for n in (small, big):
        root = workdir / f"docs-{n}"
        write_lines(root / "corpus" / "lines.txt", n, shortest=3, longest=8, near=False, seed=3)
        reports = []
        for _ in range(DOC_BUILDS):
            shutil.rmtree(root / "out", ignore_errors=True)  # each build fresh (no part from the cache)
            reports.append(driver_peak(root, EXACT, part_bytes))
        if not reports[0]["duplicates"]:
            raise RuntimeError("the short-document corpus has no duplicate: the dedupe phases did not run")
        sizes[n] = sorted(reports, key=lambda r: r["driver_kib"])[len(reports) // 2]  # the median build
        peaks[n] = " ".join(f"{r['driver_kib'] / 1024:.0f}" for r in reports)
    ratio = sizes[big]["driver_kib"] / sizes[small]["driver_kib"]
    detail = (
        f"(driver peak {sizes[big]['driver_kib'] / 1024:.0f} MB for {big:,} documents vs "
        f"{sizes[small]['driver_kib'] / 1024:.0f} MB for {small:,} (anonymous; VmHWM "
        f"{sizes[big]['hwm_kib'] / 1024:.0f} and {sizes[small]['hwm_kib'] / 1024:.0f} MB); dedupe on, workers=2; "
        f"builds {sizes[big]['seconds']:.1f} s and {sizes[small]['seconds']:.1f} s; spawned worker peak "
        f"{sizes[big]['worker_kib'] / 1024:.0f} MB and {sizes[small]['worker_kib'] / 1024:.0f} MB; median of "
        f"{DOC_BUILDS} fresh builds each, driver MB: {peaks[big]} | {peaks[small]})"
    )
    return Measure("build.driver_rss_10m_vs_1m_docs", ratio, 1.3, detail, higher_is_better=False)


def _near_line(small: int, big: int, workdir: Path, part_bytes: int) -> Measure:
    sizes = {}
    for n in (small, big):
        root = workdir / f"near-{n}"
        per_line = 720  # bytes: 1,342 MB came out of 1 GiB / 560 lines on 2026-12-04
        bytes_ = write_lines(root / "corpus" / "lines.txt", n // per_line, shortest=40, longest=120, near=True, seed=4)
        report = driver_peak(root, EXACT + NEAR, part_bytes)
        if not report["near"]:
            raise RuntimeError("no near-copy was found: the near_dedupe phases did not run")
        sizes[n] = (report, bytes_)
    (rb, bb), (rs, bs) = sizes[big], sizes[small]
    ratio = rb["driver_kib"] / rs["driver_kib"]
    detail = (
        f"(driver peak {rb['driver_kib'] / 1024:.0f} MB for {bb / MB:.0f} MB of text vs "
        f"{rs['driver_kib'] / 1024:.0f} MB for {bs / MB:.0f} MB (anonymous; VmHWM {rb['hwm_kib'] / 1024:.0f} and "
        f"{rs['hwm_kib'] / 1024:.0f} MB); near_dedupe on, workers=2; "
        f"{rb['near']:.0f} and {rs['near']:.0f} near-copies removed; builds {rb['seconds']:.1f} s and "
        f"{rs['seconds']:.1f} s; spawned worker peak {rb['worker_kib'] / 1024:.0f} MB and "
        f"{rs['worker_kib'] / 1024:.0f} MB)"
    )
    return Measure("clean.near_dedupe_driver_rss", ratio, 1.3, detail, higher_is_better=False)


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    if quick:
        # smaller sizes fall below one part, where the one task the driver runs grows with the
        # corpus (a fixed cost per part at full size)
        yield _doc_line(20_000, 200_000, workdir, PART_BYTES)
        yield _near_line(MB, 5 * MB, workdir, PART_BYTES)
    else:
        yield _doc_line(1_000_000, 10_000_000, workdir, PART_BYTES)
        yield _near_line(100 * MB, 1000 * MB, workdir, PART_BYTES)
