"""Cluster overhead: a build on a local Dask cluster against the default local build.

The cluster (2 worker processes of one thread each) is started, and warmed with a small build,
outside the timing; the local side is ``seqpipe build --workers 2`` as part_build.py measures it
(the build's own seconds, one ingest thread per worker). Both build the same corpus, read once
before any timing, into fresh directories, and must write the same manifest.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path

from common import Measure
from part_build import MB, RECIPE, cli_build_seconds, make_corpus, warm

from seqpipe import build
from seqpipe.recipe import Recipe, parse_recipe

NAME = "build.dask_vs_local"

try:  # the shared generator of real-shaped corpora, once it is in the tree
    from _shapes import write_many_small_files
except ImportError:  # until then, a private one: one document of about approx_bytes per file
    from _corpus import CorpusWriter

    def write_many_small_files(directory: Path, files: int, approx_bytes: int, seed: int) -> int:
        """``files`` one-paragraph text files of about ``approx_bytes`` under ``directory``
        (in subdirectories); return the bytes written."""
        writer = CorpusWriter(seed=seed)
        total = 0
        for i in range(files):
            # about 6 bytes per generated token; blank lines joined so the file is one document
            body = writer.chunk(max(8, approx_bytes // 6)).replace(b"\n\n", b"\n").strip() + b"\n"
            path = directory / f"shelf-{i % 7}" / f"note-{i:06d}.txt"
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(body)
            total += len(body)
        return total


def many_files_corpus(root: Path, files: int) -> Recipe:
    """``files`` small files of about 2.5 KB under ``root/corpus``, and the bench recipe over them."""
    write_many_small_files(root / "corpus", files, 2500, seed=11)
    text = RECIPE.replace('paths = "corpus/*.txt"', 'paths = "corpus/**/*.txt"')
    (root / "recipe.toml").write_text(text, encoding="utf-8")
    return parse_recipe(text, root)


def dask_seconds(recipe: Recipe, out: Path, executor: object) -> float:
    """Seconds for one fresh build through ``executor`` (no cached part reused)."""
    if out.exists():
        raise RuntimeError(f"{out} exists: a timed build must start without a cache")
    t0 = time.perf_counter()
    result = build(recipe, out, executor=executor, progress=False)  # type: ignore[arg-type]
    seconds = time.perf_counter() - t0
    if result.parts_reused:
        raise RuntimeError("a timed build reused cached parts")
    return seconds


def compare(recipe: Recipe, workdir: Path, tag: str, executor: object, repeat: int) -> tuple[float, float]:
    """Best local (--workers 2) and best Dask seconds over ``repeat`` alternating rounds; the two
    builds must write the same manifest."""
    warm(sorted(p for p in (recipe.root / "corpus").rglob("*.txt")))
    local = dask = float("inf")
    for i in range(repeat):
        local = min(local, cli_build_seconds(recipe, workdir / f"{tag}-local-{i}", workers=2)[0])
        dask = min(dask, dask_seconds(recipe, workdir / f"{tag}-dask-{i}", executor))
    a = (workdir / f"{tag}-local-0" / "manifest.json").read_bytes()
    b = (workdir / f"{tag}-dask-0" / "manifest.json").read_bytes()
    if a != b:
        raise RuntimeError(f"{tag}: the Dask build's manifest differs from the local build's")
    return local, dask


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    try:
        import distributed
    except ImportError:
        print(f"{NAME}: skipped (dask/distributed not installed: pip install '.[dask]')", flush=True)
        return
    from seqpipe.dask_support import executor_for_client

    big_bytes, files, repeat = (2 * MB, 100, 1) if quick else (200 * MB, 10_000, 2)
    big = make_corpus(workdir / "big", big_bytes, files=8)  # 25 MB files, as part_build's scaling line
    many = many_files_corpus(workdir / "many", files)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
    with cluster, distributed.Client(cluster) as client:
        executor = executor_for_client(client)
        warm_up = make_corpus(workdir / "warm", MB // 4, files=2)
        dask_seconds(warm_up, workdir / "warm-out", executor)  # imports and first calls in each worker
        t_big = compare(big, workdir, "big", executor, repeat)
        t_many = compare(many, workdir, "many", executor, repeat)
    ratios = {"big": t_big[0] / t_big[1], "many": t_many[0] / t_many[1]}
    yield Measure(
        NAME,
        min(ratios.values()),
        0.8,
        f"(worse of two: {big_bytes / MB:.0f} MB in 8 files local {t_big[0]:.2f} s vs Dask {t_big[1]:.2f} s = "
        f"{ratios['big']:.2f}; {files} files of ~2.5 KB local {t_many[0]:.2f} s vs Dask {t_many[1]:.2f} s = "
        f"{ratios['many']:.2f}; local = --workers 2, Dask = 2 workers x 1 thread, best of {repeat})",
    )
