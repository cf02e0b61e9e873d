"""The package surface (seqpipe/__init__.py): ``__all__`` is sorted and complete, every public
name resolves to its home module, and ``import seqpipe`` stays cheap."""

from __future__ import annotations

import subprocess
import sys
import types

import seqpipe


def run_python(code: str) -> str:
    """What a fresh interpreter prints for ``code`` (nothing imported beforehand)."""
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()


def test_all_is_sorted() -> None:
    """__all__ is in sorted order."""
    assert seqpipe.__all__ == sorted(seqpipe.__all__)


def test_all_equals_the_public_names() -> None:
    """__all__ lists exactly the public names of the package namespace, the lazily imported
    ones included; submodules bound as attributes by an import are not public names."""
    public = {n for n in dir(seqpipe) if not n.startswith("_")}
    modules = {n for n in public if isinstance(getattr(seqpipe, n), types.ModuleType)}
    assert set(seqpipe.__all__) == public - modules
    assert set(seqpipe.__all__) == set(seqpipe._HOME)


def test_every_public_name_resolves_to_its_home_module() -> None:
    """Each name in __all__ is defined in the module ``_HOME`` names for it (or inside that
    package), and none of them is a module."""
    for name in seqpipe.__all__:
        value = getattr(seqpipe, name)
        home = f"seqpipe.{seqpipe._HOME[name]}"
        assert not isinstance(value, types.ModuleType), name
        assert value.__module__ == home or value.__module__.startswith(f"{home}."), name


def test_unknown_attribute_raises_attribute_error() -> None:
    """A name the package does not have raises AttributeError (so hasattr() works)."""
    assert not hasattr(seqpipe, "no_such_name")


def test_import_loads_neither_numpy_nor_pyarrow_nor_an_extra() -> None:
    """``import seqpipe`` imports neither numpy nor pyarrow (the command line starts its build
    workers before those imports) nor an optional extra (torch, matplotlib, Dask)."""
    code = (
        "import sys, seqpipe\n"
        "print(sorted(m for m in ('numpy', 'pyarrow', 'torch', 'matplotlib', 'distributed') if m in sys.modules))"
    )
    assert run_python(code) == "[]"


def test_private_modules_are_modules_and_public_names_stay_functions() -> None:
    """Importing the builder and verifier modules, before or after the public names, binds the
    modules under their own (private) names: ``seqpipe.build`` and ``seqpipe.verify`` stay the
    functions, and module attributes (the docs schema in formats) are reachable."""
    code = (
        "import seqpipe._build as b, seqpipe._verify as v, seqpipe.formats as f, seqpipe\n"
        "from seqpipe import build, verify\n"
        "print(build is b.build, verify is v.verify, seqpipe.build is build, seqpipe._build is b,\n"
        "      type(seqpipe.verify).__name__, f.DOCS_SCHEMA.names[0])"
    )
    assert run_python(code) == "True True True True function start"
