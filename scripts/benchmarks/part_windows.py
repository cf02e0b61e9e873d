"""Reading side: batches of windows from memory-mapped Arrow IPC shards.

Inputs are made here, deterministically: uint16 token ids from a fixed-seed
generator, written as shards with ``seqpipe.shards.write_shard`` and read back
memory-mapped with ``read_shard``. Every ratio compares two things measured in
this run; the only absolute figure is the open-to-first-batch time the target
is stated in.
"""

from __future__ import annotations

import gc
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
from common import Measure, best_time, best_times
from numpy.lib.stride_tricks import sliding_window_view

from seqpipe.recipe import ShardSpec
from seqpipe.shards import read_shard, write_shard
from seqpipe.stream import TokenStream
from seqpipe.windows import BatchStream

B, WINDOW = 64, 256
KEY = "bench:train"


def write_split(directory: Path, tokens: int, shard_tokens: int, seed: int) -> list[Path]:
    """Write ``tokens`` random uint16 ids as shards of ``shard_tokens``; return their paths."""
    directory.mkdir(parents=True, exist_ok=True)
    rng = np.random.Generator(np.random.PCG64(seed))
    paths = []
    for i, start in enumerate(range(0, tokens, shard_tokens)):
        ids = rng.integers(0, 50_000, min(shard_tokens, tokens - start), dtype=np.uint16)
        path = directory / f"{i:06d}.arrow"
        write_shard(path, ids)
        paths.append(path)
    return paths


def open_stream(paths: list[Path]) -> TokenStream:
    return TokenStream([read_shard(p, dtype=np.dtype(np.uint16)) for p in paths])


def rss_anon() -> int:
    """Anonymous resident memory of this process in bytes (Linux /proc/self/status)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("RssAnon:"):
            return int(line.split()[1]) * 1024
    raise RuntimeError("RssAnon not found in /proc/self/status (Linux only)")


def first_batch_seconds(chunks: list[np.ndarray], repeat: int = 25) -> float:
    """Best time from building the TokenStream over mapped shards to holding random batch 0
    (a fraction of a millisecond: best of 25, so one slow tick of the machine does not decide)."""

    def run() -> None:
        bs = BatchStream(TokenStream(chunks), batch_size=B, window=WINDOW, seed=1, stream_key=KEY)
        bs.batch(0)

    return best_time(run, repeat=repeat)


def measures(quick: bool, workdir: Path) -> Iterator[Measure]:
    tokens = 1_000_000 if quick else 100_000_000
    small_tokens = 100_000 if quick else 1_000_000  # at least a few batches of B*WINDOW
    # full size: shards of the size a build writes by default ([shards] tokens = 2**24)
    shard_tokens = 1 << 18 if quick else ShardSpec().tokens
    big = write_split(workdir / "big", tokens, shard_tokens, seed=7)
    small = write_split(workdir / "small", small_tokens, shard_tokens, seed=8)
    split_bytes = tokens * 2

    # --- anonymous memory over one full epoch: the shards must stay file-backed, not copied --------
    stream = open_stream(big)
    # one epoch first (another epoch number, so other windows) lets the allocator settle on its
    # batch- and page-sized blocks; what the measured epoch adds after that is what reading costs
    for _ in BatchStream(stream, batch_size=B, window=WINDOW, seed=1, epoch=1, stream_key=KEY):
        pass
    gc.collect()
    before = rss_anon()
    bs = BatchStream(stream, batch_size=B, window=WINDOW, seed=1, epoch=0, stream_key=KEY)
    t0 = time.perf_counter()
    check = 0
    for batch in bs:
        check ^= int(batch.targets[-1, -1])
    epoch_s = time.perf_counter() - t0
    del batch  # the last batch was consumed; what stays is the stream's own state
    growth = rss_anon() - before
    yield Measure(
        "windows.rss_anon_growth",
        growth / split_bytes,
        0.1,
        f"(RssAnon {growth / 2**10:+,.0f} KiB over a {split_bytes / 2**20:.0f} MiB split; "
        f"epoch of {len(bs)} batches B={B} window={WINDOW} in {epoch_s:.1f} s)",
        higher_is_better=False,
    )
    del bs, stream
    gc.collect()

    # --- open to first batch, and how it grows with the split ------------------------------------------
    map_s = best_time(lambda: open_stream(big), repeat=5)
    big_s = first_batch_seconds(list(open_stream(big).chunks))
    small_s = first_batch_seconds(list(open_stream(small).chunks))
    yield Measure(
        "windows.open_to_first_batch_ms",
        big_s * 1e3,
        50.0,
        f"(best of 25: TokenStream over {len(big)} mapped shards of {tokens:,} tokens to the first "
        f"random batch B={B} window={WINDOW}; {big_s / small_s:.2f}x the {small_tokens:,}-token case; "
        f"mapping the shards beforehand took {map_s * 1e3:.2f} ms)",
        higher_is_better=False,
    )
    yield Measure(
        "windows.first_batch_scaling",
        big_s / small_s,
        2.0,
        f"(open-to-first-batch at {tokens:,} tokens / at {small_tokens:,} tokens)",
        higher_is_better=False,
    )

    # --- random batches from mapped shards vs a plain numpy gather from memory -------------------------
    stream = open_stream(big)
    bs = BatchStream(stream, batch_size=B, window=WINDOW, seed=1, stream_key=KEY)
    n_batches = min(len(bs), 50 if quick else 400)
    starts = [bs.starts_for(k)[0] for k in range(n_batches)]
    in_memory = np.concatenate(stream.chunks)  # the baseline's copy, made outside the timing
    windows = sliding_window_view(in_memory, WINDOW + 1)

    index = np.arange(WINDOW + 1)

    def ours() -> None:
        for k in range(n_batches):
            bs.batch(k)

    def numpy_gather() -> None:
        # the plain gather: one index array per batch, fancy-indexed from the in-memory array
        for s in starts:
            block = in_memory[s[:, None] + index].astype(np.int64)
            _pair = block[:, :-1], block[:, 1:]  # the same input/target views a batch carries

    def numpy_strided() -> None:
        # the fastest numpy form we know: fancy-index a sliding-window view (one row copy per window)
        for s in starts:
            block = windows[s].astype(np.int64)
            _pair = block[:, :-1], block[:, 1:]

    for fn in (ours, numpy_gather, numpy_strided):  # first pass maps the pages; timings below are warm
        fn()
    t_ours, t_numpy, t_strided = best_time(ours, 5), best_time(numpy_gather, 5), best_time(numpy_strided, 5)
    yield Measure(
        "windows.random_rate_vs_numpy_gather",
        t_numpy / t_ours,
        0.5,
        f"(best of 5, {n_batches} batches B={B} window={WINDOW} int64: {n_batches / t_ours:,.0f} batches/s "
        f"from {len(big)} mapped shards vs {n_batches / t_numpy:,.0f}/s numpy index-array gather in "
        f"memory; vs a sliding-window-view gather in memory the ratio is {t_strided / t_ours:.2f})",
    )

    # --- positions, documents as rows, length grouping ---------------------------------------------------
    yield from _row_measures(open_stream(big), n_batches)


def _with_documents(stream: TokenStream, seed: int) -> TokenStream:
    """The stream with invented document starts: lengths 20..1000 tokens from a fixed-seed generator."""
    rng = np.random.Generator(np.random.PCG64(seed))
    lengths = rng.integers(20, 1001, len(stream) // 20 + 1)
    starts = np.concatenate([[0], np.cumsum(lengths)])
    return TokenStream(list(stream.chunks), starts[starts < len(stream)])


def _row_measures(plain: TokenStream, n_batches: int) -> Iterator[Measure]:
    stream = _with_documents(plain, seed=9)
    documents = len(stream.doc_starts) if stream.doc_starts is not None else 0
    settings = {"batch_size": B, "window": WINDOW, "seed": 1, "stream_key": KEY}
    without = BatchStream(stream, **settings)
    with_pos = BatchStream(stream, positions=True, **settings)
    rows = BatchStream(stream, order="documents", **settings)
    n = min(n_batches, len(rows))

    def run(bs: BatchStream) -> None:
        for k in range(n):
            bs.batch(k)

    for bs in (without, with_pos, rows):  # first pass maps the pages
        run(bs)
    t_plain, t_pos, t_rows = best_times([lambda bs=bs: run(bs) for bs in (without, with_pos, rows)], 5)
    yield Measure(
        "windows.positions_rate",
        t_plain / t_pos,
        0.6,
        f"(best of 5 interleaved rounds, {n} random batches B={B} window={WINDOW} with positions vs without: "
        f"{n / t_pos:,.0f} vs {n / t_plain:,.0f} batches/s; {documents:,} documents)",
    )
    yield Measure(
        "rows.rate_vs_windows",
        t_plain / t_rows,
        0.5,
        f"(best of 5, {n} documents-as-rows batches vs random window batches, B={B} window={WINDOW}: "
        f"{n / t_rows:,.0f} vs {n / t_plain:,.0f} batches/s)",
    )
    grouped = BatchStream(stream, order="documents", group_lengths=8, **settings)

    def padding_share(bs: BatchStream) -> float:
        cells = padded = 0
        for k in range(n):
            mask = bs.batch(k).loss_mask
            assert mask is not None
            cells += mask.size
            padded += int(mask.size - mask.sum())
        return padded / cells

    share_plain, share_grouped = padding_share(rows), padding_share(grouped)
    yield Measure(
        "rows.padding_share_grouped_vs_plain",
        share_grouped / share_plain if share_plain else 1.0,
        1.0,
        f"(info: unscored target cells over {n} documents-as-rows batches: {share_grouped:.1%} with "
        f"group_lengths=8, {share_plain:.1%} without; documents of 20..1000 tokens, window={WINDOW})",
        higher_is_better=False,
    )
