"""seqpipe: raw text to verified, sharded token datasets and reproducible training batches.

The public API, in data-flow order::

    recipe = load_recipe("recipe.toml")             # or Recipe(...) from dataclasses
    result = build(recipe, "data/ferry")            # -> BuildResult (manifest, summary)
    report = verify("data/ferry")                   # -> VerifyReport (problems, if any)
    ds = open_dataset("data/ferry")                 # -> Dataset (splits as token streams)
    for batch in ds.split("train").batches(batch_size=32, steps=128, seed=1): ...
    write_report("data/ferry", "data/ferry/report")
"""

import typing as _typing

__version__ = "0.1.0"  # before the imports below: build.py records it in manifests

from seqpipe.build import BuildResult, build
from seqpipe.dataset import Dataset, Split, load_tokenizer, open_dataset
from seqpipe.errors import SeqpipeError
from seqpipe.recipe import Recipe, load_recipe, parse_recipe
from seqpipe.stream import TokenStream
from seqpipe.verify import VerifyReport, verify
from seqpipe.windows import Batch, BatchStream, StreamState, stream_fingerprint

if _typing.TYPE_CHECKING:
    from seqpipe.report import corpus_report, write_report

_LAZY = ("corpus_report", "write_report")  # seqpipe.report, imported on first use: workers never need it


def __getattr__(name: str) -> object:
    if name in _LAZY:
        import seqpipe.report

        return getattr(seqpipe.report, name)
    raise AttributeError(f"module 'seqpipe' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted({*globals(), *_LAZY})

__all__ = [
    "Batch",
    "BatchStream",
    "BuildResult",
    "Dataset",
    "Recipe",
    "SeqpipeError",
    "Split",
    "StreamState",
    "TokenStream",
    "VerifyReport",
    "build",
    "corpus_report",
    "load_recipe",
    "load_tokenizer",
    "open_dataset",
    "parse_recipe",
    "stream_fingerprint",
    "verify",
    "write_report",
]
