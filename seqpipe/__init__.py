"""seqpipe: raw text to verified, sharded token datasets and reproducible training batches.

The public API, in data-flow order::

    recipe = load_recipe("recipe.toml")             # or Recipe(...) from dataclasses
    result = build(recipe, "data/ferry")            # -> BuildResult (manifest, summary)
    report = verify("data/ferry")                   # -> VerifyReport (problems, if any)
    ds = open_dataset("data/ferry")                 # -> Dataset (splits as token streams)
    for batch in ds.split("train").batches(batch_size=32, window=128, seed=1): ...
    write_report("data/ferry", "ferry-report")      # outside the dataset, which verify checks
"""

import importlib as _importlib
import typing as _typing

__version__ = "0.1.0"  # the build records it in manifests

if _typing.TYPE_CHECKING:
    from seqpipe._build import BuildResult, build
    from seqpipe._verify import VerifyReport, verify
    from seqpipe.dataset import Dataset, Split, load_encoder, open_dataset
    from seqpipe.errors import SeqpipeError
    from seqpipe.evaluation import Evaluation
    from seqpipe.filter_preview import preview_filters
    from seqpipe.metrics import LossFigures, loss_figures
    from seqpipe.recipe import Recipe, load_recipe, parse_recipe
    from seqpipe.report import corpus_report, write_report
    from seqpipe.rows import attention_mask
    from seqpipe.stream import TokenStream
    from seqpipe.windows import Batch, BatchStream, StreamState, stream_fingerprint

# Each public name is imported from its module on first use, so `import seqpipe` imports
# neither numpy nor pyarrow: `seqpipe build --workers N` starts its workers before those
# imports (DEVELOPERS.md, "Where the time goes"), and a spawned worker imports only what its
# tasks need. A new public name goes here, in __all__ and in the TYPE_CHECKING imports.
_HOME: _typing.Final = {
    "BuildResult": "_build",
    "build": "_build",
    "Dataset": "dataset",
    "Split": "dataset",
    "load_encoder": "dataset",
    "open_dataset": "dataset",
    "SeqpipeError": "errors",
    "Evaluation": "evaluation",
    "LossFigures": "metrics",
    "loss_figures": "metrics",
    "attention_mask": "rows",
    "preview_filters": "filter_preview",
    "Recipe": "recipe",
    "load_recipe": "recipe",
    "parse_recipe": "recipe",
    "corpus_report": "report",
    "write_report": "report",
    "TokenStream": "stream",
    "VerifyReport": "_verify",
    "verify": "_verify",
    "Batch": "windows",
    "BatchStream": "windows",
    "StreamState": "windows",
    "stream_fingerprint": "windows",
}


def __getattr__(name: str) -> object:
    home = _HOME.get(name)
    if home is None:
        raise AttributeError(f"module 'seqpipe' has no attribute {name!r}")
    value = getattr(_importlib.import_module(f"seqpipe.{home}"), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_HOME})


__all__ = [
    "Batch",
    "BatchStream",
    "BuildResult",
    "Dataset",
    "Evaluation",
    "LossFigures",
    "Recipe",
    "SeqpipeError",
    "Split",
    "StreamState",
    "TokenStream",
    "VerifyReport",
    "attention_mask",
    "build",
    "corpus_report",
    "load_encoder",
    "load_recipe",
    "loss_figures",
    "open_dataset",
    "parse_recipe",
    "preview_filters",
    "stream_fingerprint",
    "verify",
    "write_report",
]
