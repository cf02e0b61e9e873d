"""The public API: ``__all__`` is sorted, complete, and importing seqpipe pulls no optional extra."""

from __future__ import annotations

import subprocess
import sys

import seqpipe


def test_all_is_sorted_and_equals_public_names() -> None:
    """__all__ lists exactly the public names of the package namespace, sorted."""
    assert seqpipe.__all__ == sorted(seqpipe.__all__)
    public = {n for n in dir(seqpipe) if not n.startswith("_")}  # dir: the lazily imported names too
    modules = {n for n in public if type(getattr(seqpipe, n)).__name__ == "module"}
    assert set(seqpipe.__all__) == public - modules


def test_import_needs_no_optional_extra() -> None:
    """import seqpipe loads neither torch, matplotlib nor Dask."""
    code = "import sys, seqpipe; print(sorted(m for m in ('torch', 'matplotlib', 'distributed') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_import_is_lazy_and_build_verify_stay_functions() -> None:
    """``import seqpipe`` imports neither numpy nor pyarrow (the command line starts its build
    workers before those imports); ``seqpipe.build`` (from ``seqpipe._build``) and
    ``seqpipe.verify`` stay the functions after their modules are imported."""
    code = (
        "import sys, seqpipe\n"
        "heavy = sorted(m for m in ('numpy', 'pyarrow') if m in sys.modules)\n"
        "import seqpipe._build, seqpipe._verify\n"
        "from seqpipe._verify import VerifyReport\n"
        "first = [callable(seqpipe.build), callable(seqpipe.verify), seqpipe.build.__module__]\n"
        "from seqpipe import build, verify, open_dataset, write_report\n"
        "print(heavy, first, build is seqpipe.build, verify.__name__, open_dataset.__module__)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[] [True, True, 'seqpipe._build'] True verify seqpipe.dataset"
