"""The large-catalogue benchmark as a picture: for every size and path, p99 per click against top-20
agreement with exact scoring, at 50 clicks/s and at 8 visits at once, with the page budget as a
line (matplotlib, Agg: no display needed). The path worth serving sits low and to the right."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

BUDGET_MS = 25.0  # the page budget the targets use


def catalogue_rows(report: dict[str, Any]) -> list[tuple[str, str, dict[str, Any]]]:
    """(model label, path, its measurements) for every row of a bench.catalogue report."""
    rows = [(f"random, {int(size):,}", path, r) for size, entry in report.get("sizes", {}).items() for path, r in entry["paths"].items()]
    trained = report.get("trained")
    if trained:
        rows += [(f"trained, {trained['items']:,}", path, r) for path, r in trained["paths"].items()]
    return rows


def write_chart(report: dict[str, Any], path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib import ticker

    rows = catalogue_rows(report)
    models = list(dict.fromkeys(model for model, _, _ in rows))
    markers = dict(zip(models, "osD^vP*X"))
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.5), dpi=110, sharey=True)
    for ax, load, title in ((axes[0], "paced_50_per_s", "at 50 clicks/s"), (axes[1], "concurrency_8", "8 visits at once")):
        placed: list[tuple[float, float]] = []
        for model, scoring, r in rows:
            x, y = r["top20_agreement"], r[load]["p99_ms"]
            ax.plot(x, y, markers[model], color="tab:blue" if model.startswith("trained") else "tab:gray", markersize=7)
            # Labels of points (nearly) on top of each other go side by side instead of over each other.
            beside = sum(1 for px, py in placed if abs(px - x) < 0.002 and abs(math.log10(py / y)) < 0.02)
            ax.annotate(scoring, (x, y), textcoords="offset points", xytext=(5 + 40 * beside, 3), fontsize=7)
            placed.append((x, y))
        ax.axhline(BUDGET_MS, color="tab:red", linestyle="--", label=f"page budget {BUDGET_MS:g} ms")
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}"))
        ax.yaxis.set_minor_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}" if str(round(v))[0] in "25" else ""))
        ax.set_xlabel("top-20 agreement with exact scoring")
        ax.set_title(f"p99 per click over HTTP, {title}", fontsize=10)
        ax.grid(alpha=0.3, which="both")
    axes[0].set_ylabel("p99, ms (log scale)")
    handles = [plt.Line2D([], [], marker=markers[m], linestyle="", color="tab:blue" if m.startswith("trained") else "tab:gray", label=f"{m} items")
               for m in models]  # fmt: skip
    handles.append(plt.Line2D([], [], color="tab:red", linestyle="--", label=f"page budget {BUDGET_MS:g} ms"))
    axes[1].legend(handles=handles, loc="center left", fontsize=8)
    fig.suptitle("cairn large catalogues: latency against agreement, by scoring path")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path
