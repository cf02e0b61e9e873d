"""Run every benchmark part (scripts/benchmarks/part_*.py) and judge the targets."""

from __future__ import annotations

import argparse
import importlib.util
import sys
import tempfile
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from common import Measure  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(prog="scripts/bench")
    ap.add_argument("--quick", action="store_true", help="small inputs, runs in seconds")
    ap.add_argument("--no-judge", action="store_true", help="print results but never fail on a target")
    ap.add_argument("--only", default="", help="run only parts whose file name contains this")
    args = ap.parse_args()
    failed = False
    for path in sorted(HERE.glob("part_*.py")):
        if args.only and args.only not in path.stem:
            continue
        spec = importlib.util.spec_from_file_location(path.stem, path)
        assert spec and spec.loader
        module = importlib.util.module_from_spec(spec)
        try:
            spec.loader.exec_module(module)
            with tempfile.TemporaryDirectory(prefix=f"seqpipe-bench-{path.stem}-") as tmp:
                for m in module.measures(quick=args.quick, workdir=Path(tmp)):
                    assert isinstance(m, Measure)
                    print(m.line(), flush=True)
                    failed |= not m.met
        except Exception:  # a broken part must fail the run loudly, with its traceback
            traceback.print_exc()
            print(f"{path.stem}: ERROR (see traceback above)", flush=True)
            return 2
    if failed and not args.no_judge:
        print("scripts/bench: at least one target missed", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
