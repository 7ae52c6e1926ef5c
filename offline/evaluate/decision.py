"""The verdict: which recommender to serve, weighing its lift against what a click costs.

    best               the recommender with the highest Recall@20 (the oracle is a yardstick, not a candidate)
    strongest simple   the best of pop, spop, markov, item-knn and session-knn by Recall@20
    lift               best over strongest simple (or, when a simple one is best, the best GRU over it),
                       Recall@20 and MRR@20 with the paired session bootstrap (evaluation.lift)
    added p99          the best's p99 per click minus the strongest simple one's
    fits               the best's p99 per click within --p99-budget-ms

A win is claimed only when the whole 95% interval of the Recall@20 lift lies above zero; an
interval that holds zero reads "inside the noise", and the simpler recommender is recommended.
"""

from __future__ import annotations

from collections.abc import Mapping

from offline.evaluate.evaluation import Result, lift
from offline.evaluate.serving_cost import ClickCost

SIMPLE = ("pop", "spop", "markov", "item-knn", "session-knn")
# What each offline name is called when the service runs it (markov and spop it does not run).
SERVED_AS = {"pop": "popularity", "item-knn": "neighbours", "session-knn": "session-knn"}
DEFAULT_P99_BUDGET_MS = 25.0


def served_as(name: str) -> str | None:
    return "gru" if name.startswith("gru") else SERVED_AS.get(name)


def _pct(x: float | None) -> str:
    return "n/a" if x is None or x != x else f"{x:+.1%}"


def decide(results: Mapping[str, Result], costs: Mapping[str, ClickCost], budget_ms: float = DEFAULT_P99_BUDGET_MS, k: int = 20) -> dict:
    """The verdict as JSON-ready data, with `recommendation` (one plain sentence) and `lines` to print."""
    metric, mrr = f"recall@{k}", f"mrr@{k}"
    candidates = {n: r for n, r in results.items() if n != "oracle" and metric in r.metrics}
    simple = {n: r for n, r in candidates.items() if n in SIMPLE}
    grus = {n: r for n, r in candidates.items() if n.startswith("gru")}
    if not candidates:
        return {"recommendation": "nothing to decide: no recommender was evaluated", "lines": []}
    best = max(candidates, key=lambda n: candidates[n].metrics[metric].value)
    out: dict = {"metric": metric, "p99_budget_ms": budget_ms, "best": best}
    if not simple:
        out["recommendation"] = f"{best} is best; no simple recommender was evaluated to weigh it against"
        out["lines"] = [out["recommendation"]]
        return out
    strongest = max(simple, key=lambda n: simple[n].metrics[metric].value)
    challenger = best if best not in SIMPLE else (max(grus, key=lambda n: grus[n].metrics[metric].value) if grus else None)
    out["strongest_simple"] = strongest
    out["challenger"] = challenger
    cost_of = {n: costs[n] for n in (strongest, challenger) if n is not None and n in costs}
    for n, c in cost_of.items():
        out.setdefault("p99_ms", {})[n] = c.p99_ms
    if challenger is None:
        out["recommendation"] = f"serve {strongest}: it is the best evaluated, and no GRU was evaluated"
        out["lines"] = [out["recommendation"]]
        return out

    lifts = {}
    for m in (metric, mrr):
        point, (lo, hi) = lift(results[challenger], results[strongest], m)
        lifts[m] = {"value": point, "ci95": [lo, hi]}
    out["lift"] = lifts
    lo, hi = lifts[metric]["ci95"]
    added = cost_of[challenger].p99_ms - cost_of[strongest].p99_ms if len(cost_of) == 2 else None
    out["added_p99_ms"] = added
    challenger_p99 = cost_of[challenger].p99_ms if challenger in cost_of else None
    fits = None if challenger_p99 is None else challenger_p99 <= budget_ms  # None: not measured
    out["fits_budget"] = fits
    wins = lo > 0
    loses = hi < 0
    out["judgement"] = "better" if wins else "worse" if loses else "inside the noise"

    simple_pick = strongest if served_as(strongest) else max(
        (n for n in simple if served_as(n)), key=lambda n: simple[n].metrics[metric].value, default=strongest
    )
    note = "" if simple_pick == strongest else f" ({strongest} is not a recommender the service runs; the strongest it runs is {simple_pick})"
    lift_text = f"{challenger}'s Recall@{k} lift over {strongest} is {_pct(lifts[metric]['value'])} (95% CI {_pct(lo)} to {_pct(hi)})"
    cost_text = (
        f"{challenger} costs {challenger_p99:.2f} ms p99 per click "
        + (f"({added:.2f} ms more than {strongest})" if added >= 0 else f"({-added:.2f} ms less than {strongest})")
        if challenger_p99 is not None and added is not None
        else "its cost per click was not measured"
    )
    if wins and fits is None:
        rec = f"serve {challenger} if its cost fits your budget: {lift_text}, but {cost_text}"
    elif wins and fits:
        rec = f"serve {challenger}: {lift_text}, and {cost_text}, within the {budget_ms:g} ms budget"
    elif wins:
        rec = f"serve {simple_pick}{note}: {lift_text}, but {cost_text}, over the {budget_ms:g} ms budget"
    elif loses:
        rec = f"serve {simple_pick}{note}: {lift_text}; the GRU is worse"
    else:
        rec = f"serve {simple_pick}{note}: {lift_text}, inside the noise"
    out["recommendation"] = rec
    out["lines"] = [
        f"best: {best}; strongest simple recommender: {strongest}",
        f"{challenger} vs {strongest}: Recall@{k} {_pct(lifts[metric]['value'])} (95% CI {_pct(lo)} to {_pct(hi)}), "
        f"MRR@{k} {_pct(lifts[mrr]['value'])} (95% CI {_pct(lifts[mrr]['ci95'][0])} to {_pct(lifts[mrr]['ci95'][1])})",
        f"cost per click: {cost_text}; budget {budget_ms:g} ms p99: {'not measured' if fits is None else 'fits' if fits else 'does not fit'}",
        f"recommendation: {rec}",
    ]
    return out


def build_decision(
    results: Mapping[str, Result],
    costs: Mapping[str, ClickCost],
    budget_ms: float,
    resamples: int,
    seed: int,
    settings: dict,
    training: dict[str, list[dict]] | None = None,
) -> dict:
    """The `decision` part of evaluation.json: settings, costs, verdict, breakdowns, curves, training."""
    from offline.evaluate.breakdowns import group_lifts, group_metrics, recall_curve

    verdict = decide(results, costs, budget_ms)
    strongest = verdict.get("strongest_simple")
    with_groups = {n: r for n, r in results.items() if r.groups is not None}
    lifts_over_simple = {}
    if strongest in with_groups:
        for n, r in with_groups.items():
            if n not in (strongest, "oracle"):
                lifts_over_simple[n] = group_lifts(r.groups, with_groups[strongest].groups, resamples, seed)
                point, (lo, hi) = lift(r, results[strongest], "recall@20") if "recall@20" in r.metrics else (None, (None, None))
                lifts_over_simple[n]["all"] = {"recall@20": {"value": point, "ci95": [lo, hi]}}
    sknn = settings.get("session_knn")
    return _finite({
        **settings,
        "session_knn": sknn,
        "serving_defaults": {"exclude_seen": settings["exclude_seen"]["value"]},
        "serving_cost": {n: c.to_json() for n, c in costs.items()},
        "verdict": verdict,
        "breakdowns": {n: group_metrics(r.groups, resamples, seed) for n, r in with_groups.items()},
        "lift_over_strongest_simple": lifts_over_simple,
        "recall_curve": {n: recall_curve(r.groups, resamples, seed) for n, r in with_groups.items()},
        "training": training or {},
    })


def _finite(value):
    """NaN and infinities become None: evaluation.json stays strict JSON."""
    if isinstance(value, float):
        return value if value == value and abs(value) != float("inf") else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value
