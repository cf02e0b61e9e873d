"""Progress bars (tqdm) that stay quiet when output is not a terminal or the caller says so."""

from __future__ import annotations

import sys
from typing import Any


def enabled(progress: bool | None) -> bool:
    """``None`` means: show bars only when stderr is a terminal."""
    if progress is None:
        return sys.stderr.isatty()
    return progress


def bar(total: int | float | None, desc: str, *, unit: str = "it", show: bool = False, **kw: Any) -> Any:
    """A tqdm bar, disabled unless ``show``."""
    from tqdm import tqdm

    return tqdm(
        total=total, desc=desc, unit=unit, disable=not show, leave=False, dynamic_ncols=True, file=sys.stderr, **kw
    )
