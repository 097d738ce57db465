"""Draw an inspection: tree depth and leaf-count distributions, and feature usage.

matplotlib is an optional extra (`pip install 'tree2sql[plot]'`); nothing else in
tree2sql needs it, so it is imported only when a plot is asked for.
"""

from __future__ import annotations

import math
import statistics
from pathlib import Path

from tree2sql.errors import UserError
from tree2sql.inspect import Inspection

MAX_FEATURE_BARS = 40  # beyond this the chart shows the most used features only
HISTOGRAM_BINS = 20  # at most this many whole-number bins per histogram
PLOT_FIX = "install the plotting extra: pip install 'tree2sql[plot]'"


def check_plot_target(path: Path) -> None:
    """Fail early, before any long work, when matplotlib is absent or the name is wrong."""
    try:
        import matplotlib  # noqa: F401
    except ImportError as exc:
        raise UserError("--plot needs matplotlib, which is not installed", PLOT_FIX) from exc
    if path.suffix.lower() != ".png":
        raise UserError(f"--plot {str(path)!r} is not a .png file", "name the file like model.png")


def plot_inspection(report: Inspection, path: Path) -> None:
    """Write a PNG with three panels: depth histogram, leaves histogram, feature splits."""
    check_plot_target(path)
    import matplotlib

    matplotlib.use("Agg")  # files only: works without a display
    import matplotlib.pyplot as plt

    features = report.features
    title = "splits per feature"
    if len(features) > MAX_FEATURE_BARS:
        top = sorted(features, key=lambda f: -f.splits)[:MAX_FEATURE_BARS]
        features = sorted(top, key=lambda f: f.index)
        title += f" (the {MAX_FEATURE_BARS} most used of {len(report.features)})"
    fig = plt.figure(figsize=(11, max(5.0, 2 + 0.2 * len(features))), constrained_layout=True)
    grid = fig.add_gridspec(2, 2, width_ratios=[1, 1.3])
    _histogram(fig.add_subplot(grid[0, 0]), report.tree_depths, "tree depth", "depth (edges)")
    _histogram(fig.add_subplot(grid[1, 0]), report.tree_leaves, "leaves per tree", "leaves")
    bars = fig.add_subplot(grid[:, 1])
    names = [f.name for f in features]
    colors = ["#b0b0b0" if f.splits == 0 else "#3b6ea8" for f in features]
    bars.barh(range(len(features)), [f.splits for f in features], color=colors)
    bars.set_yticks(range(len(features)), names, fontsize=8)
    bars.margins(y=0.01)
    bars.invert_yaxis()  # model order, top to bottom
    bars.set_xlabel("split nodes over all trees (grey: unused)")
    bars.set_title(title)
    fig.suptitle(f"{report.source or 'model'}: {report.n_nodes:,} nodes, "
                 f"{report.n_leaves:,} leaves")
    try:
        fig.savefig(path, format="png", dpi=100)
    except OSError as exc:
        raise UserError(f"cannot write {str(path)!r}: {exc.strerror or exc}",
                        "choose a writable path for --plot") from exc
    finally:
        plt.close(fig)


def _histogram(axes, values: list[int], title: str, xlabel: str) -> None:
    from matplotlib.ticker import MaxNLocator

    low, high = min(values), max(values)
    step = max(1, math.ceil((high - low + 1) / HISTOGRAM_BINS))  # whole-number bins
    axes.hist(values, bins=range(low, high + step + 1, step), color="#3b6ea8",
              edgecolor="white", align="left" if step == 1 else "mid")
    median = statistics.median(values)
    axes.axvline(median, color="#c0392b", linestyle="--", label=f"median {median:g}")
    axes.legend(loc="upper right", fontsize=8)
    axes.yaxis.set_major_locator(MaxNLocator(integer=True))
    if step == 1:
        axes.set_xticks(range(low, high + 1))  # one tick per bar, whole numbers only
    else:
        axes.xaxis.set_major_locator(MaxNLocator(integer=True))
    axes.set_title(title)
    axes.set_xlabel(xlabel)
    axes.set_ylabel("trees")
