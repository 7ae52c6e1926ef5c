"""Write a load-test or capacity report as JSON (for machines) and Markdown (for people).

Report fields (JSON; the Markdown shows the same numbers):
    kind             "cairn-loadtest/1" or "cairn-capacity/1"
    started_at, wall_s
    target           url, served_here, service (recommender, session_store, artifacts, artifact_name, artifact_version, workers)
    settings         users, load_workers, mode (think-time | rate | ramp), step_rates, step_duration_s,
                     duration_s, count, budget_ms, exclude_seen, think_scale, max_think_s, replay
    visits           data, split, available, clicks, taken
    budget           p99_ms, max_error_rate, max_fallback_rate
    verdict          met (bool), reasons (list)
    overall, steps[] index, target_rps, window_s, requests, rps, latency_ms {p50, p95, p99, max,
                     mean}, error_rate, errors {kind: n}, served_by {name: share},
                     fallback_reason {reason | "none": share}, hit_rate, hits, hit_events,
                     visits_started, visits_completed, generator_cpu_percent, meets_budget,
                     failures, notes (steps only)
    load_generator   workers, cpu_count, max_cpu_percent, bottleneck (bool), notes
    locust           requests, failures (Locust's own counts, a cross-check of ours)
    capacity         (capacity reports only) see service/load/capacity.py
Latency percentiles are nearest-rank (service/load/stats.py); shares are fractions of good answers.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from loadtest.chart import write_chart
from service.errors import LoadTestError


def write_report(report: dict[str, Any], folder: Path, stem: str) -> tuple[Path, Path, Path]:
    """`<folder>/<stem>.json`, `<stem>.md` and `<stem>.png` (p99 and fallbacks by rate); the paths."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        json_path, md_path, png_path = folder / f"{stem}.json", folder / f"{stem}.md", folder / f"{stem}.png"
        json_path.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
        write_chart(report, png_path)
        md_path.write_text(render_markdown(report) + f"\n![p99 and fallbacks by rate]({png_path.name})\n", encoding="utf-8")
    except OSError as exc:
        raise LoadTestError(f"--report {folder}: cannot write the report ({exc})") from exc
    return json_path, md_path, png_path


def render_markdown(r: dict[str, Any]) -> str:
    capacity = r.get("capacity")
    verdict = r["verdict"]
    if capacity is None:
        headline = f"cairn load test: {'budget met' if verdict['met'] else 'budget NOT met'}"
    elif capacity["found"]:
        headline = f"cairn capacity: {capacity['per_core_rps']:.1f} requests/s per service core"
    else:
        headline = "cairn capacity: no step met the budget"
    lines = [f"# {headline}", ""]
    t, s, b = r["target"], r["settings"], r["budget"]
    if t["served_here"]:
        svc = t["service"]
        lines.append(
            f"Service: started here at {t['url']} (recommender {svc['recommender'] or 'default'}, session store {svc['session_store'] or 'default'}, "
            f"{svc['workers']} worker(s))."
        )
    else:
        lines.append(f"Service: {t['url']}.")
    lines += [
        f"Started {r['started_at']}, ran {r['wall_s']:.1f} s. Budget: p99 <= {b['p99_ms']:g} ms, "
        f"error rate <= {b['max_error_rate']:.2%}, fallbacks under load <= {b.get('max_fallback_rate', 1.0):.2%}.",
        f"Load: {s['users']} visitors on {s['load_workers']} Locust worker(s), mode {s['mode']}, "
        f"{s['duration_s']:g} s in {len(s['step_rates'])} step(s) of {s['step_duration_s']:g} s; "
        f"count {s['count']}, budget_ms {s['budget_ms']}, exclude_seen {str(s['exclude_seen']).lower()}, "
        f"think scale {s['think_scale']:g}, replay {s['replay']}.",
        f"Visits: {r['visits']['available']} held-out visits ({r['visits']['clicks']} clicks) from "
        f"{r['visits']['data']}; {r['visits']['taken']} replays started.",
        "",
    ]
    if capacity is not None:
        lines += _capacity_lines(capacity)
    lines += ["## Steps", ""]
    lines.append("| step | target rps | achieved rps | requests | p50 ms | p95 ms | p99 ms | max ms | error rate | hit rate | generator CPU | meets |")
    lines.append("|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|:---|")
    for row in r["steps"] + [r["overall"]]:
        lines.append(_step_row(row))
    lines += ["", "## Answers by recommender and fallback reason", ""]
    lines.append("| step | served_by | fallback_reason | errors |")
    lines.append("|---:|:---|:---|:---|")
    for row in r["steps"] + [r["overall"]]:
        name = "all" if row["index"] is None else str(row["index"])
        lines.append(f"| {name} | {_shares(row['served_by'])} | {_shares(row['fallback_reason'])} | {_counts(row['errors'])} |")
    lines += ["", "## Verdict", ""]
    if verdict["met"]:
        lines.append("Every step met the budget.")
    lines += [f"- {reason}" for reason in verdict["reasons"]]
    g = r["load_generator"]
    lines += [
        "",
        "## Load generator",
        "",
        f"{g['workers']} worker process(es) on {g['cpu_count']} CPU core(s); busiest worker at "
        f"{g['max_cpu_percent']:.0f}% CPU. "
        + ("It may have been the bottleneck." if g["bottleneck"] else "It was not the bottleneck."),
    ]
    lines += [f"- {n}" for n in g["notes"]]
    loc = r["locust"]
    lines += ["", f"Locust's own count: {loc['requests']} click requests, {loc['failures']} failures.", ""]
    return "\n".join(lines)


def _capacity_lines(c: dict[str, Any]) -> list[str]:
    lines = ["## Capacity", ""]
    if not c["found"]:
        lines += [f"No step met the budget: {c['why']}", ""]
    else:
        lines += [
            f"Highest rate meeting the budget: **{c['rate_rps']:.1f} requests/s** (step target {c['step_target_rps']:g}/s) "
            f"on {c['service_cores']:g} service core(s): **{c['per_core_rps']:.1f} requests/s per core**.",
        ]
        if c["ramp_exhausted"]:
            lines.append("Every step of the ramp met the budget: the capacity is at least this; ramp higher to find it.")
        else:
            lines.append(f"The next step failed: {c['why']}")
        if c.get("target_rate") is not None:
            lines.append(
                f"For {c['target_rate']:g} requests/s: {c['cores_needed']} core(s), i.e. {c['replicas_needed']} replica(s) of "
                f"{c['service_cores']:g} core(s), planned at {c['headroom']:.0%} of the measured rate "
                f"({c['cores_needed_at_full']} core(s) at 100%)."
            )
        lines.append("")
    lines += [f"Caveat: {c['caveat']}", ""]
    return lines


def _num(x: Any, fmt: str = ".2f") -> str:
    return "-" if x is None else format(x, fmt)


def _step_row(row: dict[str, Any]) -> str:
    lat = row["latency_ms"]
    name = "all" if row["index"] is None else str(row["index"])
    return (
        f"| {name} | {_num(row['target_rps'], 'g')} | {_num(row['rps'], '.1f')} | {row['requests']} | {_num(lat['p50'])} | "
        f"{_num(lat['p95'])} | {_num(lat['p99'])} | {_num(lat['max'])} | {row['error_rate']:.2%} | "
        f"{_num(row['hit_rate'], '.3f')} | {row['generator_cpu_percent']:.0f}% | {'yes' if not row['failures'] else 'no'} |"
    )


def _shares(d: dict[str, float]) -> str:
    return ", ".join(f"{k} {v:.1%}" for k, v in d.items()) or "-"


def _counts(d: dict[str, int]) -> str:
    return ", ".join(f"{k}: {v}" for k, v in d.items()) or "-"
