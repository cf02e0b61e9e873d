"""PNG plots of the report. matplotlib is an optional extra (``pip install '.[plots]'`` in a checkout), imported lazily.

Only matplotlib's object API is used (a ``Figure`` with its own Agg canvas), so making a
plot never switches the process-wide pyplot backend.
"""

from __future__ import annotations

import importlib.util
from collections.abc import Mapping
from pathlib import Path
from typing import Final

import numpy as np

from seqpipe.errors import SeqpipeError
from seqpipe.report.stats import RankCurve

RANK_FREQUENCY_PNG: Final = "rank_frequency.png"
MAX_POINTS: Final = 2000  # log-spaced ranks drawn per curve: the shape, at a fixed cost


def plots_available() -> bool:
    """True when matplotlib can be imported."""
    try:
        return importlib.util.find_spec("matplotlib") is not None
    except (ImportError, ValueError):
        return False


def _sample(freqs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    ranks = np.arange(1, len(freqs) + 1)
    if len(freqs) <= MAX_POINTS:
        return ranks, freqs
    pick = np.unique(np.geomspace(1, len(freqs), MAX_POINTS).astype(np.int64)) - 1
    return ranks[pick], freqs[pick]


def rank_frequency_png(path: Path, curves: Mapping[str, RankCurve], *, title: str) -> bool:
    """Draw relative frequency (count / the split's content tokens, so splits of any size
    compare) against rank on log-log axes, one curve per split, with its fitted power law over
    the ranks it covers (the types counted at least ``x_min`` times). ``title`` names the
    dataset. Returns False (writing nothing) without matplotlib."""
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        return False
    fig = Figure(figsize=(7, 5), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    for name, curve in curves.items():
        if len(curve.counts) == 0 or curve.tokens == 0:
            continue
        r, f = _sample(np.asarray(curve.counts, dtype=np.float64) / curve.tokens)
        (line,) = ax.loglog(r, f, marker=".", markersize=2, linewidth=1, label=name)
        fit = curve.fit
        if fit is not None:
            fr = np.geomspace(1.0, float(fit.types), 50)
            ax.loglog(
                fr,
                fit.rank_line(fr) / curve.tokens,
                linestyle="--",
                linewidth=1,
                color=line.get_color(),
                label=f"{name} fit: alpha = {fit.alpha:.3f}, s = {fit.rank_exponent:.3f} (x_min {fit.x_min})",
            )
    ax.set_xlabel("rank (reserved tokens excluded)")
    ax.set_ylabel("count / content tokens of the split")
    ax.set_title(f"Rank-frequency: {title}")
    ax.grid(True, which="major", alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize="small")
    try:
        fig.savefig(str(path), format="png")
    except OSError as exc:
        raise SeqpipeError(f"{path}: cannot write the plot ({exc})") from exc
    return True
