"""Cost of a click at visit positions 1, 10 and 50: cairn, its floors, its fallbacks and two naive
alternatives, measured side by side in one run.

    python -m bench.side_by_side [--out reports/bench/side_by_side.json] [--max-seconds N] [--items 40000]

Set-up: a random-weight artifact (40,000 items, hidden size 100, one layer; speed depends on sizes
only) and the same weights as a PyTorch checkpoint (checked byte for byte against the exported
graph). Every server is a process pinned to one core (taskset), the load generator and
redis-server on the other; all traffic goes to 127.0.0.1, one request at a time (concurrency 1).

Variants:
- gru-step: the exported step graph alone on ONNX Runtime, batch 1, one thread (the floor), click
  after click as in step.py's tight mode; gru-step-cold: the same with the caches flushed before
  every click (step.py's cold mode), the output matrix streaming from memory;
- numpy-floor: f @ O^T + b and top-k in NumPy on one thread (what no implementation can skip);
- cairn-memory, cairn-redis: `cairn serve` end to end, GRU, memory store and Redis;
- neighbours, popularity: `cairn serve` answering from the neighbour table and from popularity;
- torch-eager: the PyTorch model inside the request, hidden state kept (service/bench/naive_serving.py);
- recompute-onnx, recompute-torch: no hidden state kept; the GRU is run over the visit's whole
  click history on every request (step by step on ONNX Runtime; as one sequence in PyTorch).

The in-process floors are timed on the servers' core. Each round plays one visit of 50 clicks (the
longest position asked; the same clicks for every variant) through every variant in a shuffled
order, so drift and noise from the rest of the machine hit all of them alike; the latency of the
k-th click is recorded. Growth is the median at the longest position over the median at the
first, and the same from a straight line fitted through the medians of every position (less
noisy): about 1 for a service that keeps the hidden state, rising with the visit for one that
recomputes it.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from service.artifacts.format import STEP_GRAPH, load_artifact
from bench.matvec_floor import MatVecFloor
from bench.harness.ports import free_port
from bench.harness.processes import launch, stop_all, wait_http
from bench.harness.redis_process import RedisProcess
from bench.service import COUNT, Connection, click_stream, pct
from bench.step import EVICT_BYTES
from service.errors import BenchError, CairnError
from service.runtime.onnx_step import OnnxStep

LENGTHS = (1, 10, 50)
MAX_LENGTH = 500  # longest visit played; recompute costs grow with its square
TOP_N_FLOOR = COUNT + 10  # the floors rank as many as the service asks for with a short visit to leave out
FLAT_LIMIT = 1.25  # growth (longest / first position) still counted as flat: our own target
PRIME_CLICKS = 5  # untimed clicks of another visit first, so the measured one starts warm
REQUEST_TIMEOUT_S = 30.0  # one click; recompute at length 50 takes tens of ms
STARTUP_TIMEOUT_S = 120.0  # every server starts at once on one core
_SERVER_TIMING = re.compile(rb"(\w+);dur=([\d.]+)")  # W3C Server Timing entries, as service.py reads them
IN_PROCESS = ("gru-step", "gru-step-cold", "numpy-floor")
SERVICE = {  # variant -> (CAIRN_RECOMMENDER, store)
    "cairn-memory": ("gru", "memory"),
    "cairn-redis": ("gru", "redis"),
    "neighbours": ("neighbours", "memory"),
    "popularity": ("popularity", "memory"),
}
NAIVE = ("torch-eager", "recompute-onnx", "recompute-torch")
VARIANTS = (*IN_PROCESS, *SERVICE, *NAIVE)
GRU_ANSWERS = ("cairn-memory", "cairn-redis", "torch-eager", "recompute-onnx", "recompute-torch")  # the same model: the same lists
DESCRIPTIONS = {
    "gru-step": "exported GRU step on ONNX Runtime, in process, batch 1 (floor)",
    "gru-step-cold": "the same step with the caches flushed before each click (output matrix from memory)",
    "numpy-floor": "NumPy f @ O^T + b and top-k, in process (floor)",
    "cairn-memory": "cairn serve, GRU, memory store",
    "cairn-redis": "cairn serve, GRU, Redis store",
    "neighbours": "cairn serve, neighbour table, memory store",
    "popularity": "cairn serve, popularity, memory store",
    "torch-eager": "PyTorch model eagerly inside the request, hidden state kept",
    "recompute-onnx": "GRU over the whole click history every request, ONNX steps",
    "recompute-torch": "GRU over the whole click history every request, PyTorch nn.GRU",
}



@dataclass
class _Server:
    variant: str
    port: int
    proc: subprocess.Popen
    log: Path
    served_by: str  # what a correct answer reports


# -- processes -------------------------------------------------------------------------------------


def _same_weights_checkpoint(artifact: Path, hidden: int, seed: int, out: Path) -> None:
    """The artifact's weights as a PyTorch checkpoint, rebuilt from the seed as write_random_artifact does."""
    from offline.export.onnx_graph import artifact_step_graph
    from offline.export.artifact_writer import random_model
    from offline.model.gru import GRUConfig, save_checkpoint
    from service.artifacts.item_vectors import EMBEDDING, ITEM_VECTORS

    model = random_model(GRUConfig(n_items=len(load_artifact(artifact).item_ids), embedding_size=hidden, hidden_size=hidden), seed)
    # Byte-equal graphs and equal item tables (the graph refers to them) hold equal weights: the
    # torch variants then run exactly the served model.
    same_tables = np.array_equal(np.load(artifact / EMBEDDING), model.embedding.weight.detach().numpy()) and np.array_equal(
        np.load(artifact / ITEM_VECTORS), model.output_weight.detach().numpy()
    )
    if artifact_step_graph(model) != (artifact / STEP_GRAPH).read_bytes() or not same_tables:
        raise BenchError(f"the rebuilt PyTorch model does not match {artifact / STEP_GRAPH}; write_random_artifact changed")
    save_checkpoint(out, model)


# -- one visit through one variant ------------------------------------------------------------------


async def _http_visit(
    server: _Server, session: str, items: list[str], answers: list[list[str]] | None, timings: dict[str, list[list[float]]] | None
) -> tuple[list[float], int]:
    """Latency in ms of each click of one visit, and how many answers came from another recommender.

    With `timings`, the server's Server-Timing entries (store, model, total) are added per position.
    """
    conn = await asyncio.wait_for(Connection.open(server.port), REQUEST_TIMEOUT_S)
    out: list[float] = []
    other = 0
    clock = time.perf_counter
    path = f"/v1/sessions/{session}/clicks"
    try:
        # After the other variants ran, this server's code and data are out of the caches and its
        # first click would pay for that, whatever the visit: a few clicks of another visit first.
        prime = f"/v1/sessions/{session}-prime/clicks"
        for item in items[:PRIME_CLICKS]:
            body = b'{"item_id":"%s","count":%d}' % (item.encode(), COUNT)
            status, _, payload = await asyncio.wait_for(conn.post_with_head(prime, body), REQUEST_TIMEOUT_S)
            if status != 200:
                raise BenchError(f"{server.variant} answered {status}: {payload[:200].decode(errors='replace')}")
        for k, item in enumerate(items):
            body = b'{"item_id":"%s","count":%d}' % (item.encode(), COUNT)
            t0 = clock()
            status, head, payload = await asyncio.wait_for(conn.post_with_head(path, body), REQUEST_TIMEOUT_S)
            out.append((clock() - t0) * 1e3)
            if status != 200:
                raise BenchError(f"{server.variant} answered {status}: {payload[:200].decode(errors='replace')}")
            answer = json.loads(payload)
            other += answer["served_by"] != server.served_by
            if answers is not None:
                answers.append([entry["item_id"] for entry in answer["items"]])
            if timings is not None:
                for name, dur in _SERVER_TIMING.findall(head):
                    timings.setdefault(name.decode(), [[] for _ in items])[k].append(float(dur))
    finally:
        conn.close()
    return out, other


def _step_visit(step: OnnxStep, items: np.ndarray, evict: np.ndarray | None = None) -> list[float]:
    """With `evict`, a buffer larger than the caches is written before each click (untimed), as
    step.py's cold mode does: the output matrix then streams from memory."""
    hidden = step.zero_hidden(1)  # [L, 1, H]
    for k in range(min(PRIME_CLICKS, len(items))):  # warm, as the servers are (see _http_visit)
        step.run(items[k : k + 1], hidden, TOP_N_FLOOR)
    out = []
    clock = time.perf_counter_ns
    for k in range(len(items)):
        if evict is not None:
            evict += 1  # reads and writes the whole buffer
        t0 = clock()
        hidden, _, _ = step.run(items[k : k + 1], hidden, TOP_N_FLOOR)
        out.append((clock() - t0) / 1e6)
    return out


def _floor_visit(floor: MatVecFloor, length: int) -> list[float]:
    for _ in range(PRIME_CLICKS):
        floor()
    out = []
    clock = time.perf_counter_ns
    for _ in range(length):
        t0 = clock()
        floor()
        out.append((clock() - t0) / 1e6)
    return out


# -- the run -------------------------------------------------------------------------------------


@dataclass
class _Measured:
    latency: dict[str, list[list[float]]]  # variant -> click position - 1 -> ms per visit
    server_timing: dict[str, dict[str, list[list[float]]]]  # service variant -> store|model|total -> position - 1 -> ms
    answers: dict[str, list[list[str]]]  # GRU variant -> item ids answered to each click of the first visit
    off_recommender: dict[str, int]  # server variant -> answers served by another recommender (fallbacks)
    rounds: int = 0
    seconds: float = 0.0


async def _rounds(
    servers: dict[str, _Server],
    step: OnnxStep,
    floor: MatVecFloor,
    evict: np.ndarray,
    stream: list[str],
    index: dict[str, int],
    length: int,
    warmup: int,
    max_rounds: int,
    max_seconds: float,
    cores: tuple[int, int] | None,
    seed: int,
) -> _Measured:
    """Warm-up rounds, then measured rounds until `max_rounds` or `max_seconds`: one visit of
    `length` clicks through every variant per round, in a shuffled order."""
    rng = np.random.default_rng(seed)
    m = _Measured(
        latency={v: [[] for _ in range(length)] for v in VARIANTS},
        server_timing={v: {} for v in SERVICE},
        answers={v: [] for v in GRU_ANSWERS},
        off_recommender={v: 0 for v in servers},
    )
    started = time.perf_counter()
    for r in range(warmup + max_rounds):
        if r == warmup:
            started = time.perf_counter()
        elif r > warmup and time.perf_counter() - started > max_seconds:
            break
        measured = r >= warmup
        start = (r * length) % (len(stream) - length)
        items = stream[start : start + length]  # the same visit for every variant of the round
        indices = np.array([index[i] for i in items], dtype=np.int64)  # [length]
        for v in rng.permutation(VARIANTS).tolist():
            if v in IN_PROCESS:
                if cores is not None:
                    os.sched_setaffinity(0, {cores[0]})  # the floors run where the servers run
                if v == "numpy-floor":
                    lat = _floor_visit(floor, length)
                else:
                    lat = _step_visit(step, indices, evict if v == "gru-step-cold" else None)
                if cores is not None:
                    os.sched_setaffinity(0, {cores[1]})
            else:
                keep = m.answers[v] if r == 0 and v in m.answers else None
                timed = m.server_timing[v] if measured and v in m.server_timing else None
                lat, off = await _http_visit(servers[v], f"sbs-r{r}", items, keep, timed)
                m.off_recommender[v] += off
            if measured:
                for k, ms in enumerate(lat):
                    m.latency[v][k].append(ms)
        m.rounds += measured
    m.seconds = time.perf_counter() - started
    return m


def _agreement(answers: dict[str, list[list[str]]]) -> dict[str, float]:
    """Share of clicks whose list equals cairn-memory's, per GRU variant."""
    ref = answers["cairn-memory"]
    return {v: round(sum(a == b for a, b in zip(lists, ref)) / max(len(ref), 1), 4) for v, lists in answers.items()}


def _summarise(samples: dict[str, list[list[float]]], lengths: tuple[int, ...]) -> dict[str, dict]:
    med = {v: [statistics.median(s) if s else float("nan") for s in per_pos] for v, per_pos in samples.items()}
    out: dict[str, dict] = {}
    for v, per_pos in samples.items():
        positions = {}
        for k in lengths:
            s = per_pos[k - 1]
            positions[str(k)] = {
                "median_ms": round(med[v][k - 1], 4),
                "p90_ms": round(pct(s, 90), 4),
                "p99_ms": round(pct(s, 99), 4),
                "samples": len(s),
                "ratio_to_gru_step": round(med[v][k - 1] / med["gru-step"][k - 1], 3),
                "ratio_to_cairn_memory": round(med[v][k - 1] / med["cairn-memory"][k - 1], 3),
            }
        # One position's median moves by some 10% from noise alone; a straight line through the
        # medians of every position from first to last says more surely whether cost grows.
        first, last = lengths[0], lengths[-1]
        if last > first:
            slope, intercept = np.polyfit(np.arange(first, last + 1), med[v][first - 1 : last], 1)
        else:
            slope, intercept = 0.0, med[v][first - 1]
        out[v] = {
            "description": DESCRIPTIONS[v],
            "positions": positions,
            "growth": round(med[v][last - 1] / med[v][first - 1], 3),
            "slope_ms_per_click": round(float(slope), 5),
            "fitted_growth": round(float((intercept + slope * last) / (intercept + slope * first)), 3),
            "median_ms_by_position": [round(x, 4) for x in med[v]],
        }
    return out


def _print_table(report: dict) -> None:
    lengths = report["config"]["lengths"]
    res = report["variants"]
    c = report["config"]
    print(
        f"side by side: {c['n_items']} items, hidden {c['hidden_size']}, top {c['count']}, concurrency 1, "
        f"{report['rounds']} rounds in {report['measure_seconds']:.0f} s, "
        f"servers pinned: {report['environment']['pinned']}"
    )
    cols = "".join(f"{'k=' + str(k):>10}" for k in lengths)
    growth = f"growth {lengths[-1]}/{lengths[0]}   fitted   ms/click"
    blocks = (
        ("median ms of the k-th click of a visit", "median_ms", "{:>10.3f}"),
        ("ratio to the GRU step floor, same k", "ratio_to_gru_step", "{:>9.2f}x"),
        ("ratio to cairn-memory, same k", "ratio_to_cairn_memory", "{:>9.2f}x"),
        ("p90 ms", "p90_ms", "{:>10.3f}"),
        ("p99 ms", "p99_ms", "{:>10.3f}"),
    )
    for title, key, fmt in blocks:
        print(f"{title:<40}{cols}" + (f"  {growth}" if key == "median_ms" else ""))
        for v in VARIANTS:
            r = res[v]
            row = "".join(fmt.format(r["positions"][str(k)][key]) for k in lengths)
            fits = f"  {r['growth']:>10.2f}x {r['fitted_growth']:>7.2f}x {r['slope_ms_per_click']:>+10.4f}"
            print(f"  {v:<38}{row}" + (fits if key == "median_ms" else ""))
    print(f"{'server side: store / model / total ms':<40}" + "".join(f"{'k=' + str(k):>22}" for k in lengths))
    for v in SERVICE:
        st = res[v]["server_timing_median_ms"]
        parts = {k: "/".join(format(st[str(k)].get(n, float("nan")), ".2f") for n in ("store", "model", "total")) for k in lengths}
        cells = "".join(f"{parts[k]:>22}" for k in lengths)
        print(f"  {v:<38}{cells}")
    agree = report["answers_agree_with_cairn_memory"]
    print("same lists as cairn-memory (first visit): " + ", ".join(f"{v} {a:.0%}" for v, a in agree.items()))
    off = {v: n for v, n in report["answers_from_another_recommender"].items() if n}
    if off:
        print(f"answers from another recommender than asked (fallbacks): {off}")
    v = report["verdict"]
    print(
        f"growth {lengths[-1]}/{lengths[0]} (fitted over every position): cairn-memory {v['cairn_memory_growth']:.2f}x, "
        f"cairn-redis {v['cairn_redis_growth']:.2f}x -> flat (<= {FLAT_LIMIT}x): {'yes' if v['cairn_flat'] else 'NO'}; "
        f"history recompute: onnx {v['recompute_onnx_growth']:.2f}x, torch {v['recompute_torch_growth']:.2f}x"
    )


def run(args: argparse.Namespace) -> dict:
    import uvloop

    from offline.export.artifact_writer import write_random_artifact

    lengths = tuple(sorted(set(args.lengths)))
    if lengths[0] < 1 or lengths[-1] > MAX_LENGTH:
        bad = lengths[0] if lengths[0] < 1 else lengths[-1]
        raise BenchError(f"--lengths must be click positions from 1 to {MAX_LENGTH}, got {bad}")
    if args.items < 2:
        raise BenchError(f"--items must be at least 2, got {args.items}")
    if not args.max_seconds > 0:
        raise BenchError(f"--max-seconds must be positive, got {args.max_seconds}")
    if args.warmup < 0:
        raise BenchError(f"--warmup must be zero or more, got {args.warmup}")
    if args.rounds < 1:
        raise BenchError(f"--rounds must be at least 1, got {args.rounds}")
    if shutil.which("redis-server") is None:
        raise BenchError("redis-server is not on PATH; the Redis variant needs it")
    length = lengths[-1]
    available = sorted(os.sched_getaffinity(0))
    cores = (available[0], available[1]) if len(available) >= 2 and shutil.which("taskset") else None
    server_core, load_core = cores if cores is not None else (None, None)
    load_before = os.getloadavg()

    work = Path(tempfile.mkdtemp(prefix="cairn-sbs-"))
    servers: dict[str, _Server] = {}
    procs: list[subprocess.Popen] = []
    if cores is not None:
        os.sched_setaffinity(0, {load_core})
    try:
        store = work / "model_store"
        artifact = write_random_artifact(store, "bench", "v1", n_items=args.items, hidden_size=args.hidden, seed=args.seed)
        checkpoint = work / "same_weights.pt"
        _same_weights_checkpoint(artifact, args.hidden, args.seed, checkpoint)

        env = {k: v for k, v in os.environ.items() if not k.startswith("CAIRN_")}
        env.update(CAIRN_ARTIFACTS=str(store), CAIRN_LOG_LEVEL="warning", CAIRN_ORT_THREADS="1", OMP_NUM_THREADS="1")
        redis = RedisProcess(free_port(), core=load_core, log_path=work / "redis.log").start()
        procs.append(redis.proc)
        redis_url = redis.url

        for v, (model, kind) in SERVICE.items():
            port = free_port()
            cmd = [sys.executable, "-m", "service.cli", "serve", "--port", str(port), "--workers", "1", "--recommender", model]
            cmd += ["--session-store", redis_url if kind == "redis" else "memory"]
            log = work / f"{v}.log"
            procs.append(launch(cmd, core=server_core, env={**env, "CAIRN_REDIS_PREFIX": f"sbs-{v}:"}, log_path=log))
            servers[v] = _Server(v, port, procs[-1], log, model)
        for v in NAIVE:
            port = free_port()
            cmd = [sys.executable, "-m", "bench.naive_serving", "--variant", v, "--artifact", str(artifact)]
            cmd += ["--checkpoint", str(checkpoint), "--port", str(port)]
            log = work / f"{v}.log"
            procs.append(launch(cmd, core=server_core, env=env, log_path=log))
            servers[v] = _Server(v, port, procs[-1], log, v)
        for server in servers.values():
            wait_http(server.proc, server.port, "/readyz", timeout_s=STARTUP_TIMEOUT_S, log_path=server.log)

        index = load_artifact(artifact).item_index
        stream = click_stream(args.items, seed=args.seed)
        with threadpool_limits(limits=1):
            step = OnnxStep(artifact / STEP_GRAPH, threads=1)
            floor = MatVecFloor(args.items, args.hidden, 1, TOP_N_FLOOR, args.seed)
            evict = np.zeros(EVICT_BYTES // 4, dtype=np.float32)
            measured = uvloop.run(
                _rounds(servers, step, floor, evict, stream, index, length, args.warmup, args.rounds, args.max_seconds, cores, args.seed)
            )
    finally:
        stop_all(procs)
        if cores is not None:
            os.sched_setaffinity(0, set(available))
        shutil.rmtree(work, ignore_errors=True)
    variants = _summarise(measured.latency, lengths)
    for v, entries in measured.server_timing.items():
        variants[v]["server_timing_median_ms"] = {
            str(k): {name: round(statistics.median(per_pos[k - 1]), 3) for name, per_pos in entries.items() if per_pos[k - 1]}
            for k in lengths
        }
    return {
        "benchmark": "side-by-side",
        "environment": {
            "python": platform.python_version(),
            "machine": platform.machine(),
            "cores_available": len(available),
            "pinned": cores is not None,
            "server_core": server_core,
            "load_generator_core": load_core,
            "load_average_before": [round(x, 2) for x in load_before],
        },
        "config": {
            "n_items": args.items,
            "hidden_size": args.hidden,
            "layers": 1,
            "count": COUNT,
            "floor_top_n": TOP_N_FLOOR,
            "lengths": list(lengths),
            "visit_length": length,
            "warmup_rounds": args.warmup,
            "max_rounds": args.rounds,
            "max_seconds": args.max_seconds,
            "ort_threads": 1,
            "torch_threads": 1,
        },
        "rounds": measured.rounds,
        "measure_seconds": round(measured.seconds, 2),
        "variants": variants,
        "answers_agree_with_cairn_memory": _agreement(measured.answers),
        "answers_from_another_recommender": measured.off_recommender,
        "verdict": {  # on the fitted growth: see _summarise
            "flat_limit": FLAT_LIMIT,
            "cairn_memory_growth": variants["cairn-memory"]["fitted_growth"],
            "cairn_redis_growth": variants["cairn-redis"]["fitted_growth"],
            "cairn_flat": max(variants["cairn-memory"]["fitted_growth"], variants["cairn-redis"]["fitted_growth"]) <= FLAT_LIMIT,
            "recompute_onnx_growth": variants["recompute-onnx"]["fitted_growth"],
            "recompute_torch_growth": variants["recompute-torch"]["fitted_growth"],
        },
    }


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.side_by_side", description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=Path("reports/bench/side_by_side.json"), help="write the results as JSON here")
    p.add_argument("--items", type=int, default=40_000, help="catalogue size (default 40000)")
    p.add_argument("--hidden", type=int, default=100, help="GRU state size (default 100)")
    p.add_argument("--lengths", type=int, nargs="+", default=list(LENGTHS), help="click positions reported (default 1 10 50)")
    p.add_argument("--max-seconds", type=float, default=110.0, help="time for the measured rounds (default 110)")
    p.add_argument("--rounds", type=int, default=200, help="most measured rounds, one visit per variant each (default 200)")
    p.add_argument("--warmup", type=int, default=2, help="rounds played first and not recorded (default 2)")
    p.add_argument("--seed", type=int, default=0)
    args = p.parse_args(argv)
    try:
        report = run(args)
    except CairnError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    _print_table(report)
    print(f"report: {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
