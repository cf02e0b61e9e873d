"""seqpipe: raw text to verified, sharded token datasets and reproducible training batches.

The public API, in data-flow order::

    recipe = load_recipe("recipe.toml")             # or Recipe(...) from dataclasses
    result = build(recipe, "data/ferry")            # -> BuildResult (manifest, summary)
    report = verify("data/ferry")                   # -> VerifyReport (problems, if any)
    ds = open_dataset("data/ferry")                 # -> Dataset (splits as token streams)
    for batch in ds.split("train").batches(batch_size=32, window=128, seed=1): ...
    write_report("data/ferry", "data/ferry/report")
"""

import importlib as _importlib
import sys as _sys
import types as _types
import typing as _typing

__version__ = "0.1.0"  # build.py records it in manifests

if _typing.TYPE_CHECKING:
    from seqpipe.build import BuildResult, build
    from seqpipe.dataset import Dataset, Split, load_tokenizer, open_dataset
    from seqpipe.errors import SeqpipeError
    from seqpipe.recipe import Recipe, load_recipe, parse_recipe
    from seqpipe.report import corpus_report, write_report
    from seqpipe.stream import TokenStream
    from seqpipe.verify import VerifyReport, verify
    from seqpipe.windows import Batch, BatchStream, StreamState, stream_fingerprint

# Each public name is imported from its module on first use, so `import seqpipe` costs almost
# nothing and a process imports only what it uses: the command line starts its build workers
# before it imports numpy and pyarrow, and a spawned worker imports what its tasks need.
_HOME = {
    "BuildResult": "build",
    "build": "build",
    "Dataset": "dataset",
    "Split": "dataset",
    "load_tokenizer": "dataset",
    "open_dataset": "dataset",
    "SeqpipeError": "errors",
    "Recipe": "recipe",
    "load_recipe": "recipe",
    "parse_recipe": "recipe",
    "corpus_report": "report",
    "write_report": "report",
    "TokenStream": "stream",
    "VerifyReport": "verify",
    "verify": "verify",
    "Batch": "windows",
    "BatchStream": "windows",
    "StreamState": "windows",
    "stream_fingerprint": "windows",
}
# Functions named like the module they live in: importing the submodule makes Python bind the
# module to the package attribute of the same name, which must stay the function.
_SHADOWED = frozenset({"build", "verify"})


class _Package(_types.ModuleType):
    def __setattr__(self, name: str, value: object) -> None:
        if name in _SHADOWED and isinstance(value, _types.ModuleType):
            return  # the import system binding seqpipe.build / seqpipe.verify (still in sys.modules)
        super().__setattr__(name, value)


_sys.modules[__name__].__class__ = _Package


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
