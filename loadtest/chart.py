"""The load test as a picture: p99 latency and the share of load fallbacks against the rate each
step reached, with the page budget as a line (matplotlib, Agg: no display needed)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from loadtest.budget import LOAD_FALLBACKS


def write_chart(report: dict[str, Any], path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    steps = report["steps"]
    rates = [s["rps"] for s in steps]
    p99 = [s["latency_ms"]["p99"] for s in steps]
    fallbacks = [100 * sum((s.get("fallback_reason") or {}).get(r, 0.0) for r in LOAD_FALLBACKS) for s in steps]
    budget = report["budget"]["p99_ms"]
    fig, ax = plt.subplots(figsize=(7, 4), dpi=110)
    ax.plot(rates, p99, "o-", color="tab:blue", label="p99 latency")
    ax.axhline(budget, color="tab:red", linestyle="--", label=f"page budget {budget:g} ms")
    ax.set_xlabel("requests per second reached")
    ax.set_ylabel("p99 latency, ms")
    ax.grid(alpha=0.3)
    share = ax.twinx()
    share.plot(rates, fallbacks, "s:", color="tab:orange", label="load fallbacks")
    share.set_ylabel("answers that fell back under load, %")
    share.set_ylim(0, max(5.0, max(fallbacks, default=0.0) * 1.2))
    lines = ax.get_legend_handles_labels()
    more = share.get_legend_handles_labels()
    ax.legend(lines[0] + more[0], lines[1] + more[1], loc="upper left", fontsize=8)
    ax.set_title("cairn load test: latency and fallbacks by rate")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path
