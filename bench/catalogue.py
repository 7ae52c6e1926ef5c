"""Large catalogues: each scoring path (exact, fp16, int8, int4, int4+int8, clustered) at 200,000 and 1,000,000 items, side by side.

Per size: `cairn export --random --items N` (wall time, and peak memory from getrusage in the export's own process),
the artifact's size on disk, then per path (CAIRN_SCORING; `clustered@P` = clustered with
CAIRN_PROBE_CLUSTERS=P, plain `clustered` probes as many clusters as the export chose): top-20
agreement with the exact fp32 step over visit states (random weights: the worst case, scores
bunched together and nothing to cluster), and `cairn serve`
(one worker, memory store, pinned to one core; the load generator on the other) measured over HTTP:
p50/p99 per click at 50 clicks/s open loop (evenly spaced over four connections, each click timed
from when it was due: bench.service.paced), then at 8 visits at once (closed loop), the capacity at
the 25 ms budget, the worker's RSS split into private and shared
(/proc/<pid>/smaps_rollup), and which path and recommender answered (from /metrics). Budgets are
raised to 1 s so every answer comes from the GRU: this measures the scoring path, not the guards.
Beside the JSON a PNG (same name) plots each row's p99 against its agreement (bench/catalogue_chart.py).

`--trained ARTIFACT --trained-data PREPARED` adds the same rows for a trained model's artifact,
with agreement over visit states from the prepared data's test split (real visits: where the
clustered index is meant to work).

    python -m bench.catalogue [--sizes 200000 1000000] [--paths exact int8 clustered clustered@32]
                              [--trained model_store/NAME/VERSION --trained-data data/.../prepared] [--out reports/bench/catalogue.json]
"""

from __future__ import annotations

import argparse
import asyncio
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np

from bench.catalogue_chart import write_chart
from bench.harness.ports import free_port
from bench.harness.processes import launch, stop_process, wait_http
from bench.reporting import write_report
from offline.evaluate.scoring_paths import parse_scoring
from service.artifacts.item_vectors import PRECISIONS, default_precisions
from bench.service import bench_cores, click_stream, paced, saturate, service_environment
from service.errors import BenchError

TOP = 20
PACED_RATE = 50.0  # clicks/s over all connections
PACED_CONNECTIONS = 4
BUDGET_MS = 25.0  # the page budget the capacity is measured at
CAPACITY_SHARES = (0.3, 0.5, 0.7, 0.85, 1.0)  # of the closed-loop clicks/s at 8 visits
CAPACITY_CONNECTIONS = 32
CAPACITY_STEP_S = 4.0  # seconds at each rate at most
CAPACITY_BISECTIONS = 2


def export(store: Path, n_items: int, log: Path, flags: tuple[str, ...] = ()) -> dict:
    """`cairn export --random [flags]` in a child process of its own: wall seconds, and its peak RSS as the
    kernel counts it for that process (getrusage's ru_maxrss, kB on Linux)."""
    argv = ["export", "--random", "--items", str(n_items), "--artifacts", str(store), "--name", "bench", "--version", f"n{n_items}", "--overwrite",
            *flags]  # fmt: skip
    code = (
        "import resource, sys; from service.cli import main; rc = main(sys.argv[1:]); "
        "print(f'peak_rss_kb {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}', file=sys.stderr); sys.exit(rc)"
    )
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", code, *argv], capture_output=True, text=True)
    seconds = time.perf_counter() - t0
    log.write_text(done.stdout + done.stderr, encoding="utf-8")
    if done.returncode != 0:
        raise BenchError(f"export of {n_items} items failed:\n{done.stderr[-2000:]}")
    m = re.search(r"peak_rss_kb (\d+)", done.stderr)
    path = store / "bench" / f"n{n_items}"
    return {
        "seconds": round(seconds, 2),
        "peak_rss_mb": round(int(m.group(1)) / 1024, 1) if m else None,
        "artifact_mb": round(sum(p.stat().st_size for p in path.iterdir()) / 2**20, 1),
        "path": str(path),
    }


def files_for(paths: list[str], has_index: bool, n_items: int) -> tuple[str, ...]:
    """The `cairn export` flags that add what the default export of `n_items` items leaves out and
    `paths` need: reduced copies, and the clustered index; () when nothing is missing."""
    asked = {part for t in paths for part in parse_path(t)[0].split("+")}  # int4+int8 needs both tables
    default = default_precisions(n_items)
    precisions = [p for p in PRECISIONS if p in asked or p in default]
    flags = ("--precisions", *precisions) if set(precisions) != set(default) else ()
    return flags + (("--clustered-index", "always") if "clustered" in asked and not has_index else ())


def parse_path(text: str) -> tuple[str, int]:
    """`clustered@32` -> ("clustered", 32); `int8` -> ("int8", 0) (the rule `cairn evaluate --scoring` uses)."""
    try:
        return parse_scoring(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from exc


def random_states(step, rng: np.random.Generator, batch: int) -> tuple[np.ndarray, np.ndarray]:
    """(items [batch], hidden) after one to five random clicks."""
    hidden = step.zero_hidden(batch)
    for _ in range(rng.integers(1, 6)):
        hidden, _, _ = step.run(rng.integers(0, step.n_items, batch), hidden, 1)
    return rng.integers(0, step.n_items, batch), hidden


def test_split_states(step, split, rng: np.random.Generator, batch: int) -> tuple[np.ndarray, np.ndarray]:
    """(items [batch], hidden) of real visits: a prefix of a test-split visit, and its next click."""
    lengths = split.lengths()
    pool = np.flatnonzero(lengths >= 2)
    picked = pool[rng.integers(0, len(pool), batch)]
    prefix = 1 + (rng.random(batch) * np.minimum(lengths[picked] - 1, 10)).astype(np.int64)  # clicks before the scored one
    hidden = step.zero_hidden(batch)
    starts = split.offsets[picked]
    for t in range(int(prefix.max()) - 1):
        moving = t < prefix - 1  # visits with more clicks before the scored one
        clicks = split.items[starts + np.minimum(t, prefix - 1)].astype(np.int64)
        stepped, _, _ = step.run(clicks, hidden, 1)
        hidden = np.where(moving[None, :, None], stepped, hidden)
    return split.items[starts + prefix - 1].astype(np.int64), hidden


def agreement(path: Path, paths: list[str], states: int = 256, batch: int = 64, split=None) -> dict[str, float]:
    """Mean top-20 overlap of each path with the exact fp32 step, over visit states (random clicks,
    or with `split` that split's visits)."""
    from service.artifacts.format import load_artifact
    from service.runtime.active import open_step
    from service.runtime.onnx_step import OnnxStep

    a = load_artifact(path)
    exact = OnnxStep(a.step_graph)
    steps = {}
    for text in paths:
        scoring, probe = parse_path(text)
        if scoring != "exact":
            steps[text] = open_step(a, scoring, probe=probe)
    rng = np.random.default_rng(0)
    overlap: dict[str, list[float]] = {p: [] for p in steps}
    for _ in range(states // batch):
        items, hidden = random_states(exact, rng, batch) if split is None else test_split_states(exact, split, rng, batch)
        _, ref, _ = exact.run(items, hidden, TOP)
        for p, step in steps.items():
            _, got, _ = step.run(items, hidden, TOP)
            overlap[p] += [len(set(r) & set(g)) / TOP for r, g in zip(ref.tolist(), got.tolist())]
    out = {"exact": 1.0}
    out.update({p: round(float(np.mean(v)), 4) for p, v in overlap.items()})
    exact.close()
    return out


def memory_of(pid: int) -> dict[str, float]:
    """RSS of a process, MB (Linux smaps_rollup): private and shared pages, and of the RSS the
    anonymous memory (heap, ONNX Runtime's packed weights). A file page mapped by this process
    alone counts as private until a second process maps it; anonymous memory is never shared."""
    fields: dict[str, int] = {}
    for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines()[1:]:
        name, _, rest = line.partition(":")
        parts = rest.split()
        if parts and parts[0].isdigit():
            fields[name] = int(parts[0])
    private = fields.get("Private_Clean", 0) + fields.get("Private_Dirty", 0)
    shared = fields.get("Shared_Clean", 0) + fields.get("Shared_Dirty", 0)
    mb = lambda kb: round(kb / 1024, 1)  # noqa: E731
    return {"rss_mb": mb(fields.get("Rss", 0)), "private_mb": mb(private), "shared_mb": mb(shared), "anonymous_mb": mb(fields.get("Anonymous", 0))}


def paced_at_rate(port: int, items: list[str], clicks: int) -> dict:
    """`clicks` clicks at PACED_RATE per second, evenly spaced over PACED_CONNECTIONS connections,
    in visits of 40 clicks (bench.service.paced)."""
    per_connection = -(-clicks // PACED_CONNECTIONS)

    def click_of(c: int, n: int) -> tuple[str, str]:
        return f"paced-{c}-{n // 40}", items[(c * per_connection + n) % len(items)]

    return asyncio.run(paced(port, click_of, PACED_RATE, PACED_CONNECTIONS, clicks, max_seconds=clicks / PACED_RATE + 5.0))


def capacity_at_budget(port: int, items: list[str], ceiling: float, max_clicks: int, max_seconds: float) -> dict:
    """The highest open-loop rate whose p99 stays within BUDGET_MS: clicks evenly spaced at
    CAPACITY_SHARES of `ceiling` (the clicks/s measured at 8 visits at once) in turn, over
    CAPACITY_CONNECTIONS connections (enough that no connection has a click due before its answer
    while the path keeps within budget), in visits of 20 clicks. At the first rate over budget it
    halves the gap to the last rate within it, CAPACITY_BISECTIONS times. Each rate sends at most
    `max_clicks` clicks for at most `max_seconds`."""
    steps: list[dict] = []

    def within(rate: float) -> bool:
        k = len(steps)

        def click_of(c: int, n: int) -> tuple[str, str]:
            return f"cap-{k}-{c}-{n // 20}", items[(k * 7919 + c * 131 + n) % len(items)]

        r = asyncio.run(paced(port, click_of, rate, CAPACITY_CONNECTIONS, max_clicks, max_seconds))
        steps.append({"rate": round(rate, 1), **r})
        return not r["errors"] and r["p99_ms"] <= BUDGET_MS

    best, over = 0.0, None
    for share in CAPACITY_SHARES:
        rate = max(1.0, ceiling * share)
        if not within(rate):
            over = rate
            break
        best = rate
    for _ in range(CAPACITY_BISECTIONS if over is not None else 0):
        rate = (best + over) / 2
        if within(rate):
            best = rate
        else:
            over = rate
    return {"budget_ms": BUDGET_MS, "clicks_per_s": round(best, 1), "steps": steps}


def answered_by(port: int) -> dict[str, float]:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        text = r.read().decode()
    out: dict[str, float] = {}
    for kind, value in re.findall(r'cairn_gru_scoring_total\{scoring="(\w+)"\} ([\d.e+]+)', text):
        out[f"scoring_{kind}"] = float(value)
    for served, value in re.findall(r'cairn_recommendation_duration_seconds_count\{served_by="(\w+)"\} ([\d.e+]+)', text):
        out[f"served_by_{served}"] = float(value)
    for name in ("batches", "batched_clicks", "held_clicks"):  # one worker: no pid label
        m = re.search(rf"\ncairn_gru_{name} ([\d.e+]+)", text)
        if m:
            out[name] = float(m.group(1))
    return out


def batching_between(before: dict[str, float], after: dict[str, float]) -> dict[str, float]:
    """The worker's scoring calls over one phase: mean clicks per call, and clicks a call was held for."""
    calls = after.get("batches", 0.0) - before.get("batches", 0.0)
    clicks = after.get("batched_clicks", 0.0) - before.get("batched_clicks", 0.0)
    return {"mean_batch": round(clicks / calls, 2) if calls else None, "held_clicks": after.get("held_clicks", 0.0) - before.get("held_clicks", 0.0)}


def rotated(items: list[str], k: int) -> list[str]:
    """The click list starting at position k (modulo its length): different clicks for each phase."""
    k %= len(items)
    return items[k:] + items[:k]


def serve_and_measure(store: Path, name_version: tuple[str, str], path: str, cores: list[int], items: list[str], args: argparse.Namespace, log: Path) -> dict:
    scoring, probe = parse_path(path)
    env = service_environment(
        store, CAIRN_SCORING=scoring, CAIRN_PROBE_CLUSTERS=str(probe), CAIRN_ARTIFACT_NAME=name_version[0],
        CAIRN_ARTIFACT_VERSION=name_version[1], CAIRN_DEFAULT_BUDGET_MS="1000", CAIRN_MAX_BATCH="64",
    )  # fmt: skip
    port = free_port()
    t0 = time.perf_counter()
    proc = launch([sys.executable, "-m", "service.cli", "serve", "--port", str(port), "--workers", "1"], core=cores[0], env=env, log_path=log)
    allowed = os.sched_getaffinity(0)
    try:
        wait_http(proc, port, "/readyz", timeout_s=300.0, log_path=log)
        ready_s = time.perf_counter() - t0
        os.sched_setaffinity(0, {cores[1]})
        paced_at_rate(port, rotated(items, 5000), 50)  # warm-up
        before = answered_by(port)
        at_rate = paced_at_rate(port, items, args.paced_clicks)
        after_rate = answered_by(port)
        at_8 = asyncio.run(saturate(port, rotated(items, 20000), 8, args.max_clicks, args.max_seconds, 1.0))
        at_rate["batching"], at_8["batching"] = batching_between(before, after_rate), batching_between(after_rate, answered_by(port))
        capacity = capacity_at_budget(port, rotated(items, 40000), at_8["clicks_per_s"], args.max_clicks, min(args.max_seconds, CAPACITY_STEP_S))
        memory = memory_of(proc.pid)
        return {"ready_s": round(ready_s, 1), "paced_50_per_s": at_rate, "concurrency_8": at_8, "capacity": capacity, "memory": memory,
                "answers": answered_by(port)}  # fmt: skip
    finally:
        stop_process(proc)
        os.sched_setaffinity(0, allowed)  # this process (a test's, say) keeps the cores it had


def measure_paths(store: Path, name_version: tuple[str, str], paths: list[str], agree: dict[str, float], items: list[str],
                  cores: list[int], args: argparse.Namespace, work: Path) -> dict:  # fmt: skip
    out = {}
    for path in paths:
        r = serve_and_measure(store, name_version, path, cores, items, args, work / f"serve-{name_version[1]}-{path}.log")
        r["top20_agreement"] = agree.get(path)
        out[path] = r
        print(
            f"  {path:13s} 50/s p50 {r['paced_50_per_s']['p50_ms']} p99 {r['paced_50_per_s']['p99_ms']} ms | "
            f"8 visits {r['concurrency_8']['clicks_per_s']} clicks/s p50 {r['concurrency_8']['p50_ms']} p99 {r['concurrency_8']['p99_ms']} ms "
            f"(mean batch {r['concurrency_8']['batching']['mean_batch']}, held {r['concurrency_8']['batching']['held_clicks']:g}; "
            f"at 50/s held {r['paced_50_per_s']['batching']['held_clicks']:g}) | "
            f"capacity at p99 {BUDGET_MS:g} ms {r['capacity']['clicks_per_s']} clicks/s | "
            f"agreement {r['top20_agreement']} | RSS {r['memory']['rss_mb']} MB ({r['memory']['private_mb']} private, "
            f"{r['memory'].get('anonymous_mb')} anonymous) | {r['answers']}",
            flush=True,
        )
    return out


def clusters_section(path: Path, key: str = "item_clusters") -> dict | None:
    import json

    return json.loads((path / "manifest.json").read_text(encoding="utf-8")).get(key)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", type=int, nargs="*", default=[200_000, 1_000_000])
    p.add_argument("--paths", nargs="+", default=["exact", "int8", "clustered", "clustered@32"], metavar="PATH",
                   help="scoring paths: exact, fp16, int8, int4, int4+int8, clustered, clustered@N (N clusters probed)")  # fmt: skip
    p.add_argument("--trained", type=Path, metavar="ARTIFACT", help="a trained model's artifact folder, measured too")
    p.add_argument("--trained-data", type=Path, metavar="PREPARED", help="the prepared data it was trained on (test-split visits)")
    p.add_argument("--paced-clicks", type=int, default=400)
    p.add_argument("--max-clicks", type=int, default=2000)
    p.add_argument("--max-seconds", type=float, default=8.0)
    p.add_argument("--out", type=Path, default=Path("reports/bench/catalogue.json"))
    p.add_argument("--keep", action="store_true", help="keep the artifacts (printed) instead of deleting them")
    args = p.parse_args(argv)
    for text in args.paths:
        try:
            parse_path(text)
        except argparse.ArgumentTypeError as exc:
            p.error(f"--paths: {exc}")
    if (args.trained is None) != (args.trained_data is None):
        p.error("--trained and --trained-data go together")
    cores = bench_cores()
    if cores is None:
        return 2
    work = Path(tempfile.mkdtemp(prefix="cairn-catalogue-"))
    store = work / "model_store"
    report: dict = {"load_average_before": [round(x, 2) for x in os.getloadavg()], "sizes": {}}
    try:
        for n in args.sizes:
            made = export(store, n, work / f"export-{n}.log")
            made["item_clusters"] = clusters_section(Path(made["path"]))
            made["item_clusters_skipped"] = clusters_section(Path(made["path"]), "item_clusters_skipped")
            print(f"{n:,} items: export {made['seconds']} s, peak {made['peak_rss_mb']} MB, artifact {made['artifact_mb']} MB, "
                  f"clusters {made['item_clusters'] or made['item_clusters_skipped']}", flush=True)  # fmt: skip
            flags = files_for(args.paths, has_index=made["item_clusters"] is not None, n_items=n)
            if flags:
                # The default export holds default_precisions(n), and no index for random weights: the rows asked for may need more.
                made["again"] = {"flags": list(flags), **export(store, n, work / f"export-{n}-again.log", flags)}
                made["item_clusters"] = clusters_section(Path(made["path"]))
                print(f"  again with {' '.join(flags)}: {made['again']['seconds']} s, peak {made['again']['peak_rss_mb']} MB, "
                      f"artifact {made['again']['artifact_mb']} MB, clusters {made['item_clusters']}", flush=True)  # fmt: skip
            agree = agreement(Path(made["path"]), args.paths)
            paths = measure_paths(store, ("bench", f"n{n}"), args.paths, agree, click_stream(n, seed=1), cores, args, work)
            report["sizes"][str(n)] = {"export": made, "paths": paths}
            if not args.keep:
                shutil.rmtree(made["path"], ignore_errors=True)
        if args.trained is not None:
            from offline.data.dataset import PreparedData

            data = PreparedData.load(args.trained_data)
            trained = args.trained.resolve()
            agree = agreement(trained, args.paths, split=data.test)
            print(f"trained {trained} ({data.n_items:,} items): clusters {clusters_section(trained)}", flush=True)
            clicks = [data.item_ids[i] for i in data.test.items[:200_000].tolist()]
            paths = measure_paths(trained.parent.parent, (trained.parent.name, trained.name), args.paths, agree, clicks, cores, args, work)
            report["trained"] = {"artifact": str(trained), "items": data.n_items, "item_clusters": clusters_section(trained), "paths": paths}
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
        else:
            print(f"kept {work}")
    write_report(args.out, report)
    chart = write_chart(report, args.out.with_suffix(".png"))
    print(f"wrote {args.out} and {chart}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
