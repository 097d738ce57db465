"""PNG chart of the ratios: in-engine scoring time over scikit-learn and over round trip."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402


def draw(results: list[dict[str, Any]], path: Path) -> bool:
    """Grouped bars per engine/shape/workload on a log scale; False when nothing to draw."""
    done = [r for r in results if "error" not in r]
    if not done:
        return False
    labels = [f"{r['engine']}\n{r['strategy']}\n{r['workload']['label']}" for r in done]
    x = range(len(done))
    fig, ax = plt.subplots(figsize=(max(6, 1.3 * len(done)), 4.5))
    width = 0.4
    ax.bar([i - width / 2 for i in x], [r["ratio_to_library"] for r in done], width,
           label="scoring / scikit-learn predict_proba")
    ax.bar([i + width / 2 for i in x], [r["ratio_to_roundtrip"] for r in done], width,
           label="scoring / export -> predict -> import")
    ax.axhline(1.0, color="black", linewidth=0.8)
    ax.set_yscale("log")
    ax.set_ylabel("time ratio (lower is better)")
    ax.set_xticks(list(x), labels, fontsize=7)
    rows = done[0]["workload"]["rows"]
    ax.set_title(f"tree2sql in-engine scoring, {rows:,} rows")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return True
