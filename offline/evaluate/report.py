"""The report of one evaluation: report.html (self-contained, plots embedded), report.md, the plots
as PNG and evaluation.json, all from the JSON `cairn evaluate` writes (so a report can be rebuilt
from a kept JSON without evaluating again).

Plots (matplotlib, Agg backend): Recall@k for k = 1..50 with 95% bands; lift over the strongest
simple recommender with 95% bars; the lift by visit position and by target popularity; the lift
against the added p99 per click with the budget line; the GRU's validation MRR@20 by epoch.
HTML and Markdown come from Jinja2 templates (templates/); the HTML one escapes every value.
"""

from __future__ import annotations

import base64
import io
import json
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402  (after choosing the backend)
from jinja2 import Environment, FileSystemLoader  # noqa: E402

from offline.evaluate.breakdowns import BREAKDOWN_K, POPULARITY_GROUPS, POSITION_GROUPS  # noqa: E402

TEMPLATES = Path(__file__).parent / "templates"
DPI = 110


def _rows(report: dict) -> dict[str, dict]:
    return {n: r for n, r in report.items() if n not in ("decision", "provenance") and isinstance(r, dict)}


def _figure() -> tuple:
    fig, ax = plt.subplots(figsize=(7.5, 4.2), dpi=DPI)
    ax.grid(alpha=0.3)
    return fig, ax


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buf, format="png")
    plt.close(fig)
    return buf.getvalue()


def plot_recall_curve(decision: dict) -> bytes | None:
    curves = decision.get("recall_curve") or {}
    if not curves:
        return None
    fig, ax = _figure()
    for name, c in curves.items():
        (line,) = ax.plot(c["k"], c["value"], label=name)
        if None not in c["lo"] and None not in c["hi"]:
            ax.fill_between(c["k"], c["lo"], c["hi"], color=line.get_color(), alpha=0.2)
    ax.set_xlabel("k (length of the list)")
    ax.set_ylabel("Recall@k")
    ax.set_title("Recall@k with 95% bootstrap bands")
    ax.legend(fontsize=8)
    return _png(fig)


def _lift_points(decision: dict) -> list[tuple[str, float, float, float]]:
    out = []
    for name, groups in (decision.get("lift_over_strongest_simple") or {}).items():
        v = groups.get("all", {}).get(f"recall@{BREAKDOWN_K}", {})
        if v.get("value") is not None and None not in v.get("ci95", [None]):
            out.append((name, v["value"], v["ci95"][0], v["ci95"][1]))
    return out


def plot_lift(decision: dict) -> bytes | None:
    points = _lift_points(decision)
    if not points:
        return None
    fig, ax = _figure()
    names = [p[0] for p in points]
    values = [100 * p[1] for p in points]
    err = [[100 * (p[1] - p[2]) for p in points], [100 * (p[3] - p[1]) for p in points]]
    colours = ["tab:green" if p[2] > 0 else "tab:red" if p[3] < 0 else "tab:grey" for p in points]
    ax.barh(names, values, xerr=err, color=colours, capsize=4)
    ax.axvline(0, color="black", lw=1)
    strongest = decision.get("verdict", {}).get("strongest_simple", "?")
    ax.set_xlabel(f"Recall@{BREAKDOWN_K} lift over {strongest} (%), 95% paired bootstrap")
    ax.set_title(f"Lift over the strongest simple recommender ({strongest})")
    return _png(fig)


def plot_lift_by_group(decision: dict) -> bytes | None:
    lifts = decision.get("lift_over_strongest_simple") or {}
    if not lifts:
        return None
    fig, axes = plt.subplots(1, 2, figsize=(10, 4.2), dpi=DPI, sharey=True)
    for ax, prefix, groups in ((axes[0], "position", POSITION_GROUPS), (axes[1], "popularity", POPULARITY_GROUPS)):
        width = 0.8 / max(len(lifts), 1)
        for i, (name, by_group) in enumerate(lifts.items()):
            xs, ys, lo, hi = [], [], [], []
            for j, g in enumerate(groups):
                v = by_group.get(f"{prefix} {g}", {}).get(f"recall@{BREAKDOWN_K}", {})
                if v.get("value") is None or None in v.get("ci95", [None]):
                    continue
                xs.append(j - 0.4 + width * (i + 0.5))
                ys.append(100 * v["value"])
                lo.append(100 * (v["value"] - v["ci95"][0]))
                hi.append(100 * (v["ci95"][1] - v["value"]))
            ax.errorbar(xs, ys, yerr=[lo, hi], fmt="o", capsize=3, label=name)
        ax.axhline(0, color="black", lw=1)
        ax.set_xticks(range(len(groups)), [f"click {g}" if prefix == "position" else g for g in groups])
        ax.set_title(f"by {'position in the visit' if prefix == 'position' else 'target popularity'}")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel(f"Recall@{BREAKDOWN_K} lift (%), 95% CI")
    axes[1].legend(fontsize=8)
    return _png(fig)


def plot_worth_it(decision: dict) -> bytes | None:
    costs = decision.get("serving_cost") or {}
    verdict = decision.get("verdict") or {}
    strongest = verdict.get("strongest_simple")
    points = [p for p in _lift_points(decision) if p[0] in costs and costs[p[0]].get("p99_ms") is not None]
    if not points or strongest not in costs or costs[strongest].get("p99_ms") is None:
        return None
    base = costs[strongest]["p99_ms"]
    fig, ax = _figure()
    for name, value, lo, hi in points:
        x = costs[name]["p99_ms"] - base
        ax.errorbar([x], [100 * value], yerr=[[100 * (value - lo)], [100 * (hi - value)]], fmt="o", capsize=4, label=name)
    ax.plot([0], [0], "k*", markersize=12, label=f"{strongest} (reference)")
    budget = verdict.get("p99_budget_ms")
    if budget is not None:
        ax.axvline(budget - base, color="tab:red", ls="--", label=f"budget {budget:g} ms p99")
    ax.axhline(0, color="black", lw=1)
    ax.set_xlabel(f"added p99 per click over {strongest} (ms)")
    ax.set_ylabel(f"Recall@{BREAKDOWN_K} lift (%), 95% CI")
    ax.set_title("Is the lift worth the latency?")
    ax.legend(fontsize=8)
    return _png(fig)


def plot_training(decision: dict) -> bytes | None:
    curves = {n: c for n, c in (decision.get("training") or {}).items() if c}
    if not curves:
        return None
    fig, ax = _figure()
    for name, records in curves.items():
        epochs = [r["epoch"] for r in records if f"mrr@{BREAKDOWN_K}" in r]
        ax.plot(epochs, [r[f"mrr@{BREAKDOWN_K}"] for r in records if f"mrr@{BREAKDOWN_K}" in r], "o-", label=name)
    ax.set_xlabel("epoch")
    ax.set_ylabel(f"validation MRR@{BREAKDOWN_K}")
    ax.set_title("GRU training: validation MRR@20 by epoch")
    ax.legend(fontsize=8)
    return _png(fig)


PLOTS = (
    ("recall_at_k", "Recall@k for k = 1..50", plot_recall_curve),
    ("lift", "Lift over the strongest simple recommender", plot_lift),
    ("lift_by_group", "Where the lift comes from: by visit position and by target popularity", plot_lift_by_group),
    ("worth_it", "Lift against added p99 per click", plot_worth_it),
    ("training", "GRU validation MRR@20 by epoch", plot_training),
)


def _percent(x: object) -> str:
    return f"{x:+.1%}" if isinstance(x, (int, float)) else "n/a"  # None (no value) or a missing field


def _number(x: object, digits: int = 4) -> str:
    return f"{x:.{digits}f}" if isinstance(x, (int, float)) else "n/a"


def render(report: dict, images: dict[str, bytes]) -> tuple[str, str]:
    """(html, markdown) of `report` (the evaluation JSON) with the PNG `images` by plot name."""
    decision = report.get("decision") or {}
    rows = _rows(report)
    metrics = [m for m in next(iter(rows.values()), {}) if "@" in m]
    env = Environment(loader=FileSystemLoader(TEMPLATES), autoescape=True)  # every value escaped
    env.filters["percent"] = _percent
    env.filters["number"] = _number
    plots = [
        {"name": name, "title": title, "file": f"{name}.png", "data": base64.b64encode(images[name]).decode("ascii")}
        for name, title, _ in PLOTS
        if name in images
    ]
    context = {"rows": rows, "metrics": metrics, "decision": decision, "verdict": decision.get("verdict") or {}, "plots": plots, "k": BREAKDOWN_K}
    html = env.get_template("report.html.j2").render(**context)
    md_env = Environment(loader=FileSystemLoader(TEMPLATES), autoescape=False, keep_trailing_newline=True)
    md_env.filters["percent"] = _percent
    md_env.filters["number"] = _number
    md_env.filters["cell"] = lambda v: str(v).replace("|", "\\|").replace("\n", " ")
    md = md_env.get_template("report.md.j2").render(**context)
    return html, md


def write_report(folder: Path, report: dict) -> Path:
    """Write report.html, report.md, <plot>.png and evaluation.json into `folder`; returns report.html."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    decision = report.get("decision") or {}
    images = {}
    for name, _, plot in PLOTS:
        png = plot(decision)
        if png is not None:
            images[name] = png
            (folder / f"{name}.png").write_bytes(png)
    html, md = render(report, images)
    (folder / "report.html").write_text(html, encoding="utf-8")
    (folder / "report.md").write_text(md, encoding="utf-8")
    (folder / "evaluation.json").write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    return folder / "report.html"
