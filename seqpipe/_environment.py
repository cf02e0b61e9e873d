"""The versions of what decides a dataset's bytes besides the recipe and the inputs.

Cleaning uses Python's Unicode tables (``unicodedata``, ``str.lower``); segmentation uses the
``regex`` module, which carries its own Unicode tables and exposes no version for them, so its
package version stands for them; pyarrow writes every Arrow file and runs the string kernels;
numpy does the arithmetic. A manifest records them all (``environment``), and a cached part is
keyed on those that decide its bytes, so an upgrade of any of them rebuilds the parts instead of
reusing ones made under other tables.
"""

from __future__ import annotations

import platform
import unicodedata
from typing import Final

import numpy as np
import pyarrow as pa
import regex

# the versions a cached part's key includes (the manifest records ENVIRONMENT_KEYS)
PART_KEYS: Final = ("pyarrow", "regex", "unicode")


def environment() -> dict[str, str]:
    """The versions this process builds with (read on each call, never cached); the keys are
    seqpipe.formats.ENVIRONMENT_KEYS."""
    return {
        "numpy": np.__version__,
        "pyarrow": pa.__version__,
        "python": platform.python_version(),
        "regex": str(regex.__version__),
        "unicode": unicodedata.unidata_version,
    }


def part_environment() -> dict[str, str]:
    """The versions that decide the bytes of a cached part (cleaning and segmentation)."""
    env = environment()
    return {k: env[k] for k in PART_KEYS}
