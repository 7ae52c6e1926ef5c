"""The experiment's verdict from the click events: `cairn experiment report`.

Per arm: visits, answered clicks, hit rate (a click whose next click in the same visit was among
the items just shown to it: the visitor took a recommendation), click-through by shown position,
latency p50/p99 (the service's `elapsed_ms`) and the share of answers from a fallback.

Clicks within one visit are not independent, so the difference between an arm and the control
(the first declared arm) gets a 95% percentile bootstrap interval that resamples whole visits
(Efron & Tibshirani 1993, ch. 13; from memory): each replicate draws each arm's visits with
replacement and recomputes hits / opportunities. The per-arm Wilson interval (Wilson 1927) treats
opportunities as independent and is shown for reference only; the verdict uses the bootstrap.

Sample ratio mismatch: visits per arm against the declared shares, Pearson's chi-square with
k - 1 degrees of freedom. Below p = 0.001 (common practice) the assignment or the logging is broken
and the report says so first, in capitals: no verdict is drawn from such a run.
"""

from __future__ import annotations

import json
import math
from collections import defaultdict
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.stats import chi2

from service.errors import ExperimentError
from service.events.experiment import Experiment

SRM_ALPHA = 1e-3  # (common practice for sample-ratio checks)
Z95 = 1.959963984540054  # the 0.975 quantile of the standard normal
NO_ARM = "(none)"


@dataclass
class VisitCounts:
    """Per arm, one entry per visit: opportunities (clicks followed by a next click) and hits."""

    opportunities: list[int] = field(default_factory=list)
    hits: list[int] = field(default_factory=list)


@dataclass
class ArmSummary:
    arm: str
    visits: int
    clicks: int
    opportunities: int
    hits: int
    hit_rate: float
    hit_rate_wilson: tuple[float, float]
    hit_rate_bootstrap: tuple[float, float]
    ctr_by_position: list[float]
    latency_p50_ms: float
    latency_p99_ms: float
    fallback_share: float
    declared_share: float | None


@dataclass
class Difference:
    arm: str
    control: str
    difference: float  # hit rate of arm minus control's
    ci: tuple[float, float]
    relative: float  # difference over the control's hit rate

    @property
    def verdict(self) -> str:
        lo, hi = self.ci
        change = f"hit rate {self.difference:+.4f} against {self.control} (95% CI {lo:+.4f} to {hi:+.4f}; {self.relative:+.1%})"
        if lo > 0:
            return f"{self.arm} wins: {change}"
        if hi < 0:
            return f"{self.arm} loses: {change}"
        return f"no clear difference: {self.arm} {change}, an interval that includes 0"


@dataclass
class SampleRatio:
    observed: dict[str, int]
    expected: dict[str, float]
    statistic: float
    p_value: float

    @property
    def mismatch(self) -> bool:
        return self.p_value < SRM_ALPHA


@dataclass
class ExperimentReport:
    name: str
    arms: list[ArmSummary]
    differences: list[Difference]
    sample_ratio: SampleRatio | None
    events: int
    skipped: int
    bootstrap: int

    @property
    def verdict(self) -> list[str]:
        lines = []
        if self.sample_ratio is not None and self.sample_ratio.mismatch:
            lines.append(
                f"SAMPLE RATIO MISMATCH: visits per arm {self.sample_ratio.observed} do not match the declared shares "
                f"(chi-square {self.sample_ratio.statistic:.1f}, p = {self.sample_ratio.p_value:.2g}); "
                "the assignment or the event log is broken, so no verdict is drawn from this run"
            )
            return lines
        if self.sample_ratio is None:
            lines.append("no declared shares (--experiment): the sample-ratio check was not made")
        lines.extend(d.verdict for d in self.differences)
        return lines

    def to_json(self) -> dict[str, Any]:
        return {
            "experiment": self.name,
            "events": self.events,
            "skipped_lines": self.skipped,
            "bootstrap_replicates": self.bootstrap,
            "arms": [asdict(a) for a in self.arms],
            "differences": [{**asdict(d), "verdict": d.verdict} for d in self.differences],
            "sample_ratio": None if self.sample_ratio is None else {**asdict(self.sample_ratio), "mismatch": self.sample_ratio.mismatch},
            "verdict": self.verdict,
        }


# -- statistics ------------------------------------------------------------------------------------


def wilson_interval(successes: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval (E. B. Wilson, JASA 1927): the p with |p̂ - p| = z sqrt(p(1 - p)/n)."""
    if n == 0:
        return (float("nan"), float("nan"))
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return (max(0.0, centre - half), min(1.0, centre + half))


def chi_square(observed: dict[str, int], shares: dict[str, float]) -> SampleRatio:
    """Pearson's chi-square goodness of fit of the visit counts to the declared shares (df = k - 1)."""
    total = sum(observed.get(a, 0) for a in shares)
    expected = {a: total * s for a, s in shares.items()}
    statistic = sum((observed.get(a, 0) - e) ** 2 / e for a, e in expected.items() if e > 0)
    return SampleRatio({a: observed.get(a, 0) for a in shares}, expected, float(statistic), float(chi2.sf(statistic, len(shares) - 1)))


def _replicate_rates(counts: VisitCounts, replicates: int, rng: np.random.Generator, chunk: int = 64) -> np.ndarray:
    """Hit rates of `replicates` resamples of the arm's visits (with replacement)."""
    opp = np.asarray(counts.opportunities, dtype=np.int64)
    hits = np.asarray(counts.hits, dtype=np.int64)
    n = len(opp)
    out = np.empty(replicates)
    for start in range(0, replicates, chunk):
        size = min(chunk, replicates - start)
        idx = rng.integers(0, n, size=(size, n))  # [size, n] visits drawn
        o = opp[idx].sum(1)
        out[start : start + size] = hits[idx].sum(1) / np.maximum(o, 1)
    return out


# -- the report ------------------------------------------------------------------------------------


def build_report(
    events: list[dict[str, Any]], experiment: Experiment | None, bootstrap: int = 2000, seed: int = 0, skipped: int = 0
) -> ExperimentReport:
    rows = [e for e in events if not e.get("duplicate")]
    if not rows:
        raise ExperimentError("the event log holds no answered clicks")
    visits: dict[str, dict[str, list[dict[str, Any]]]] = defaultdict(lambda: defaultdict(list))
    for e in rows:
        visits[e.get("arm") or NO_ARM][str(e["session_id"])].append(e)
    if experiment is not None:
        order = [a.name for a in experiment.arms]
        unknown = sorted(set(visits) - set(order))
        if unknown:
            raise ExperimentError(f"the events name arm {unknown[0]!r}, which the experiment {experiment.name!r} does not declare")
    else:
        order = sorted(visits)
    rng = np.random.default_rng(seed)
    summaries, counts, replicates = [], {}, {}
    for arm in order:
        by_visit = visits.get(arm, {})
        counts[arm] = c = VisitCounts()
        position_hits: dict[int, int] = defaultdict(int)
        position_seen: dict[int, int] = defaultdict(int)
        latencies, fallbacks, clicks = [], 0, 0
        for clicks_of_visit in by_visit.values():
            clicks_of_visit.sort(key=lambda e: (e["t"], e["sequence"]))
            hits = opportunities = 0
            for e, nxt in zip(clicks_of_visit, clicks_of_visit[1:]):
                shown = e["shown"]
                if not shown:
                    continue
                opportunities += 1
                for r in range(1, len(shown) + 1):
                    position_seen[r] += 1
                if nxt["item_id"] in shown:
                    hits += 1
                    position_hits[shown.index(nxt["item_id"]) + 1] += 1
            c.opportunities.append(opportunities)
            c.hits.append(hits)
            for e in clicks_of_visit:
                clicks += 1
                latencies.append(float(e.get("elapsed_ms") or 0.0))
                fallbacks += e.get("fallback") is not None
        total_opp, total_hits = sum(c.opportunities), sum(c.hits)
        if by_visit:
            replicates[arm] = _replicate_rates(c, bootstrap, rng)
            boot = tuple(float(x) for x in np.percentile(replicates[arm], [2.5, 97.5]))
        else:
            boot = (float("nan"), float("nan"))
        lat = np.asarray(latencies) if latencies else np.asarray([float("nan")])
        summaries.append(
            ArmSummary(
                arm=arm,
                visits=len(by_visit),
                clicks=clicks,
                opportunities=total_opp,
                hits=total_hits,
                hit_rate=total_hits / total_opp if total_opp else float("nan"),
                hit_rate_wilson=wilson_interval(total_hits, total_opp),
                hit_rate_bootstrap=boot,  # type: ignore[arg-type]
                ctr_by_position=[position_hits[r] / position_seen[r] for r in sorted(position_seen)],
                latency_p50_ms=float(np.percentile(lat, 50)),
                latency_p99_ms=float(np.percentile(lat, 99)),
                fallback_share=fallbacks / clicks if clicks else float("nan"),
                declared_share=None if experiment is None else experiment.shares()[arm],
            )
        )
    control = summaries[0]
    differences = []
    for s in summaries[1:]:
        if s.arm in replicates and control.arm in replicates:
            diff = replicates[s.arm] - replicates[control.arm]
            lo, hi = (float(x) for x in np.percentile(diff, [2.5, 97.5]))
            d = s.hit_rate - control.hit_rate
            differences.append(Difference(s.arm, control.arm, d, (lo, hi), d / control.hit_rate if control.hit_rate else float("nan")))
    srm = None
    if experiment is not None:
        srm = chi_square({s.arm: s.visits for s in summaries}, experiment.shares())
    name = experiment.name if experiment is not None else "(undeclared)"
    return ExperimentReport(name, summaries, differences, srm, len(rows), skipped, bootstrap)


# -- output ----------------------------------------------------------------------------------------


def format_markdown(report: ExperimentReport) -> str:
    out = [f"# Experiment {report.name}", ""]
    srm = report.sample_ratio
    if srm is not None and srm.mismatch:
        out += [f"**{report.verdict[0]}**", ""]
    out += [
        "| arm | share | visits | clicks | hit rate | 95% CI (visits bootstrap) | Wilson 95% | fallback share | p50 ms | p99 ms |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for a in report.arms:
        share = "" if a.declared_share is None else f"{a.declared_share:g}"
        out.append(
            f"| {a.arm} | {share} | {a.visits} | {a.clicks} | {a.hit_rate:.4f} | [{a.hit_rate_bootstrap[0]:.4f}, {a.hit_rate_bootstrap[1]:.4f}] "
            f"| [{a.hit_rate_wilson[0]:.4f}, {a.hit_rate_wilson[1]:.4f}] | {a.fallback_share:.3f} | {a.latency_p50_ms:.2f} | {a.latency_p99_ms:.2f} |"
        )
    width = max((len(a.ctr_by_position) for a in report.arms), default=0)
    if width:
        out += ["", "Click-through by shown position (the next click was the item at that rank):", ""]
        out.append("| arm | " + " | ".join(str(r) for r in range(1, width + 1)) + " |")
        out.append("|---|" + "---|" * width)
        for a in report.arms:
            cells = [f"{x:.3f}" for x in a.ctr_by_position] + [""] * (width - len(a.ctr_by_position))
            out.append(f"| {a.arm} | " + " | ".join(cells) + " |")
    if srm is not None:
        out += ["", f"Sample ratio: chi-square {srm.statistic:.2f}, df {len(srm.observed) - 1}, p = {srm.p_value:.3g} "
                f"({'MISMATCH' if srm.mismatch else 'consistent with the declared shares'})."]  # fmt: skip
    out += ["", "Verdict:", ""] + [f"- {line}" for line in report.verdict]
    out += ["", f"{report.events} answered clicks; {report.bootstrap} bootstrap replicates over visits"
            + (f"; {report.skipped} unreadable lines skipped" if report.skipped else "") + "."]  # fmt: skip
    return "\n".join(out) + "\n"


def plot(report: ExperimentReport, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (left, right) = plt.subplots(1, 2, figsize=(10, 4))
    names = [a.arm for a in report.arms]
    rates = [a.hit_rate for a in report.arms]
    err = np.array([[a.hit_rate - a.hit_rate_bootstrap[0] for a in report.arms], [a.hit_rate_bootstrap[1] - a.hit_rate for a in report.arms]])
    left.bar(names, rates, yerr=err, capsize=6, color="#5b8c5a")
    left.set_ylabel("hit rate (next click among those shown)")
    left.set_title("hit rate by arm, 95% bootstrap over visits")
    for a in report.arms:
        right.plot(range(1, len(a.ctr_by_position) + 1), a.ctr_by_position, marker="o", label=a.arm)
    right.set_xlabel("shown position")
    right.set_ylabel("click-through")
    right.set_title("click-through by shown position")
    right.legend()
    fig.suptitle(f"experiment {report.name}")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def write_report(report: ExperimentReport, out: Path) -> list[Path]:
    out = Path(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
        paths = [out / "experiment.md", out / "experiment.json", out / "experiment.png"]
        paths[0].write_text(format_markdown(report), encoding="utf-8")
        paths[1].write_text(json.dumps(report.to_json(), indent=2) + "\n", encoding="utf-8")
        plot(report, paths[2])
    except OSError as exc:
        raise ExperimentError(f"--out {str(out)!r}: cannot write the report ({exc.strerror or exc})") from None
    return paths
