"""Model quality on the demo shop, as the targets state it: the best GRU against the oracle and the baselines.

Reads the evaluation report that `make demo` writes (reports/demo/evaluation.json) and writes
reports/bench/quality.json: each recommender's Recall@20 and MRR@20 as a share of the oracle's, and
the best GRU's lift over item-KNN and over the strongest simple baseline, in the form the published
comparisons use ((gru - baseline) / baseline).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from bench.reporting import write_report

BASELINES = ("pop", "spop", "markov", "item-knn", "session-knn")


def summarise(report: dict, metric: str = "recall@20") -> dict:
    if "oracle" not in report:
        raise ValueError("the report has no oracle: evaluate with --scenario on the demo shop")
    oracle = report["oracle"][metric]["value"]
    grus = {n: r for n, r in report.items() if n.startswith("gru") and metric in r}
    if not grus:
        raise ValueError("the report has no GRU: evaluate with --checkpoint or --artifact")
    best_gru = max(grus, key=lambda n: grus[n][metric]["value"])
    best_simple = max((b for b in BASELINES if b in report), key=lambda b: report[b][metric]["value"])
    value = report[best_gru][metric]["value"]
    return {
        "metric": metric,
        "oracle": oracle,
        "share_of_oracle": {n: r[metric]["value"] / oracle for n, r in report.items() if metric in r},
        "best_gru": best_gru,
        "best_gru_share_of_oracle": value / oracle,
        "target_share_of_oracle": 0.90,
        "lift_over_item_knn": value / report["item-knn"][metric]["value"] - 1 if "item-knn" in report else None,
        "strongest_simple_baseline": best_simple,
        "lift_over_strongest_simple_baseline": value / report[best_simple][metric]["value"] - 1,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.quality", description=__doc__.splitlines()[0])
    parser.add_argument("--report", type=Path, default=Path("reports/demo/evaluation.json"))
    parser.add_argument("--out", type=Path, default=Path("reports/bench/quality.json"))
    args = parser.parse_args(argv)
    try:
        report = json.loads(args.report.read_text(encoding="utf-8"))
        out = {m: summarise(report, m) for m in ("recall@20", "mrr@20")}
    except (OSError, ValueError, KeyError) as exc:
        print(f"quality: {args.report}: {exc}", file=sys.stderr)
        return 2
    for m, s in out.items():
        print(
            f"{m}: oracle {s['oracle']:.4f}; best GRU {s['best_gru']} at {s['best_gru_share_of_oracle']:.3f} of the oracle "
            f"(target {s['target_share_of_oracle']:.2f}); lift over item-knn {s['lift_over_item_knn']:+.1%}, "
            f"over {s['strongest_simple_baseline']} {s['lift_over_strongest_simple_baseline']:+.1%}"
        )
    write_report(args.out, out)
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
