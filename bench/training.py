"""Training speed and memory: clicks per second of the session-parallel loop and peak RSS, side by side.

    python -m bench.training [--out reports/bench/training.json]
    python -m bench.training --items 40000,200000,1000000 --batch-sizes 256 --threads 1 --compare-plain

Synthetic data of our own (a catalogue with Zipf-like popularity, sessions of a few clicks) and
the full training step: sampled output with 2,048 extra negatives, the loss, backward and the
sparse optimiser update. Every configuration (catalogue size x batch size x threads, and with
`--compare-plain` also the plain step: `nn.Embedding` lookups and `torch.optim.Adagrad` on every
parameter, the loop before step_rows) lives in its own worker process, so its peak memory
(VmHWM) is its own. After a warm-up the parent asks the workers for timed windows of steps in
turn: a burst of load from elsewhere on the machine hits every configuration alike. The median
window is compared with the target of 30,000 clicks/s at hidden size 100; RSS is also read after
the warm-up and at the end, so a per-step leak or catalogue-sized temporary would show as growth.
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from offline.model.session_batches import NegativeSampler, SessionParallelBatches, Step, sampling_weights
from offline.data.dataset import SessionSplit
from offline.model.gru import GRUConfig, NextClickGRU
from offline.model.losses import LOSS_NAMES, LossFn, get_loss, negative_mask
from offline.model.train import EpochStats, build_optimizers, keep_freed_memory, train_epoch

TARGET_CLICKS_PER_SECOND = 30_000.0


def synthetic_split(n_items: int, n_sessions: int, seed: int, zipf_exponent: float = 1.0) -> SessionSplit:
    """Sessions of 1 + Geometric(0.3) clicks (at least 2, mean about 4.3), items drawn Zipf-like by rank."""
    rng = np.random.default_rng(seed)
    lengths = 1 + rng.geometric(0.3, size=n_sessions)  # [S], >= 2
    weights = 1.0 / np.arange(1, n_items + 1, dtype=np.float64) ** zipf_exponent
    cdf = np.cumsum(weights) / weights.sum()
    n_clicks = int(lengths.sum())
    ranks = np.minimum(np.searchsorted(cdf, rng.random(n_clicks), side="right"), n_items - 1)
    items = rng.permutation(n_items)[ranks].astype(np.int32)  # popular items spread over the index range
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    return SessionSplit(items=items, offsets=offsets, times=np.arange(n_clicks, dtype=np.int64))


def _memory() -> dict[str, int]:
    """This process's current and peak resident set size in bytes (/proc/self/status, Linux)."""
    fields = {}
    for line in Path("/proc/self/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            fields[key] = int(value.split()[0]) * 1024  # reported in kB
    return {"rss_bytes": fields.get("VmRSS", 0), "peak_rss_bytes": fields.get("VmHWM", 0)}


def plain_epoch(model: NextClickGRU, steps: Iterator[Step], sampler: NegativeSampler, loss_fn: LossFn,
                optimizer: torch.optim.Optimizer, batch_size: int, max_steps: int) -> EpochStats:
    """The step written plainly, for comparison: nn.Embedding lookups (sparse gradients coalesced by the
    optimiser) and torch.optim.Adagrad on every parameter; same data, negatives and loss as train_epoch."""
    model.train()
    b = batch_size
    hidden = model.init_hidden(b)  # [L, B, H]
    n_steps, start = 0, time.perf_counter()
    for step in itertools.islice(steps, max_steps):
        targets = torch.from_numpy(step.targets)  # [B]
        if step.reset.any():
            hidden = hidden.masked_fill(torch.from_numpy(step.reset).view(1, b, 1), 0.0)
        candidates = torch.cat([targets, sampler.draw()])  # [B + M]
        features, hidden = model.step(torch.from_numpy(step.inputs), hidden)
        loss = loss_fn(model.score_candidates(features, candidates), negative_mask(targets, candidates))
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
        hidden = hidden.detach()
        n_steps += 1
    return EpochStats(loss=float("nan"), steps=n_steps, clicks=n_steps * b, seconds=time.perf_counter() - start)


@dataclass
class _Worker:
    """One configuration in its own process; the parent sends it "window N" lines, it answers one JSON line each."""

    items: int
    batch_size: int
    threads: int
    step: str  # "optimised" (train_epoch) or "plain" (plain_epoch)
    process: subprocess.Popen[str]
    rates: list[float] = field(default_factory=list)
    memory: dict[str, int] = field(default_factory=dict)

    def ask(self, line: str) -> dict:
        assert self.process.stdin is not None and self.process.stdout is not None
        self.process.stdin.write(line + "\n")
        self.process.stdin.flush()
        answer = self.process.stdout.readline()
        if not answer:
            raise SystemExit(f"worker {self.items} items, batch {self.batch_size}, {self.step} step stopped")
        return json.loads(answer)


def _worker_main(args: argparse.Namespace) -> int:
    """Worker mode: build one configuration, then answer the parent's requests on stdin/stdout."""
    keep_freed_memory()
    torch.sparse.check_sparse_tensor_invariants.disable()  # see offline.model.train
    torch.set_num_threads(args.threads[0])
    n_items, batch_size = args.items[0], args.batch_sizes[0]
    split = synthetic_split(n_items, args.sessions, args.seed)
    torch.manual_seed(args.seed)
    model = NextClickGRU(GRUConfig(n_items=n_items, embedding_size=args.hidden_size, hidden_size=args.hidden_size))
    counts = np.bincount(split.items, minlength=n_items)
    sampler = NegativeSampler(sampling_weights(counts, args.negative_skew), args.negatives, seed=args.seed)
    steps = iter(SessionParallelBatches(split, batch_size))
    del split, counts  # the batches keep what they need
    loss_fn = get_loss(args.loss)
    if args.worker == "plain":
        plain_opt = torch.optim.Adagrad(model.parameters(), lr=args.lr)
    else:
        optimizers = build_optimizers(model, args.optimizer, args.lr)
    for line in sys.stdin:
        command, _, value = line.strip().partition(" ")
        if command == "window":
            n = int(value)
            if args.worker == "plain":
                stats = plain_epoch(model, steps, sampler, loss_fn, plain_opt, batch_size, n)
            else:
                stats = train_epoch(model, steps, sampler, loss_fn, optimizers, batch_size, max_steps=n)
            if stats.steps < n:
                print(json.dumps({"error": "synthetic data ran out; raise --sessions"}), flush=True)
                return 1
            print(json.dumps({"clicks_per_second": stats.clicks_per_second, **_memory()}), flush=True)
        elif command == "memory":
            print(json.dumps(_memory()), flush=True)
        else:
            break
    return 0


def _start_worker(argv: list[str], items: int, batch_size: int, threads: int, step: str) -> _Worker:
    cmd = [sys.executable, "-m", "bench.training", *argv, "--items", str(items), "--batch-sizes", str(batch_size),
           "--threads", str(threads), "--worker", step]
    process = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    return _Worker(items, batch_size, threads, step, process)


def _ints(text: str) -> list[int]:
    try:
        values = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated whole numbers, got {text!r}") from None
    if not values or min(values) < 1:
        raise argparse.ArgumentTypeError(f"expected positive whole numbers, got {text!r}")
    return values


def _gib(n: int) -> str:
    return f"{n / 2**30:.2f}"


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    p = argparse.ArgumentParser(prog="python -m bench.training", description=__doc__.split("\n")[0])
    p.add_argument("--out", type=Path, default=None, help="write the results as JSON here")
    p.add_argument("--items", type=_ints, default=[40_000], help="catalogue sizes, comma-separated (default 40000)")
    p.add_argument("--batch-sizes", type=_ints, default=[128, 256, 512], help="comma-separated (default 128,256,512)")
    p.add_argument("--threads", type=_ints, default=sorted({1, len(os.sched_getaffinity(0))}),
                   help="torch thread counts to compare, comma-separated (default 1 and all cores)")
    p.add_argument("--compare-plain", action="store_true",
                   help="also time the plain step (nn.Embedding lookups, torch.optim.Adagrad) for each configuration")
    p.add_argument("--sessions", type=int, default=200_000, help="synthetic training sessions (default 200000)")
    p.add_argument("--negatives", type=int, default=2048)
    p.add_argument("--negative-skew", type=float, default=0.75)
    p.add_argument("--loss", choices=LOSS_NAMES, default="bpr-max")
    p.add_argument("--optimizer", choices=("adagrad", "adam"), default="adagrad")
    p.add_argument("--lr", type=float, default=0.05)
    p.add_argument("--hidden-size", type=int, default=100)
    p.add_argument("--warmup", type=int, default=10, help="untimed steps per configuration first (default 10)")
    p.add_argument("--steps", type=int, default=40, help="steps per timed window (default 40)")
    p.add_argument("--windows", type=int, default=5, help="timed windows per configuration (default 5)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--worker", choices=("optimised", "plain"), default=None, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.compare_plain and args.optimizer != "adagrad":
        p.error(f"--compare-plain runs the plain step with Adagrad only, not --optimizer {args.optimizer}")
    if args.worker is not None:
        return _worker_main(args)

    shared = [a for a in argv if a != "--compare-plain"]
    shared = _without(shared, ("--out", "--items", "--batch-sizes", "--threads"))
    steps = ["optimised", "plain"] if args.compare_plain else ["optimised"]
    print(
        f"training speed and memory: {args.sessions:,} synthetic sessions, hidden {args.hidden_size}, "
        f"{args.negatives} negatives (alpha {args.negative_skew}), {args.loss}, {args.optimizer}; "
        f"median of {args.windows} windows x {args.steps} steps, windows interleaved; one process per configuration"
    )
    workers = [_start_worker(shared, n, b, t, s) for n in args.items for t in args.threads for b in args.batch_sizes
               for s in steps]
    try:
        for w in workers:
            w.ask(f"window {args.warmup}")
        for w in workers:
            w.memory["after_warmup_rss_bytes"] = w.ask("memory")["rss_bytes"]
        # Round-robin windows: a burst of load from elsewhere on the machine hits every configuration
        # alike instead of whichever one happened to be running, so the medians stay comparable.
        for _ in range(args.windows):
            for w in workers:
                answer = w.ask(f"window {args.steps}")
                if "error" in answer:
                    raise SystemExit(f"{w.items:,} items, batch {w.batch_size}: {answer['error']}")
                w.rates.append(answer["clicks_per_second"])
        for w in workers:
            w.memory.update(w.ask("memory"))
    finally:
        for w in workers:
            if w.process.stdin is not None:
                w.process.stdin.close()
            w.process.wait(timeout=60)
    return _report(workers, args)


def _without(argv: list[str], flags: tuple[str, ...]) -> list[str]:
    """argv less the given flags and their values (the parent sets those per worker)."""
    out, skip = [], False
    for a in argv:
        if skip:
            skip = False
            continue
        if a in flags:
            skip = True
            continue
        if a.split("=", 1)[0] in flags:
            continue
        out.append(a)
    return out


def _report(workers: list[_Worker], args: argparse.Namespace) -> int:
    print(f"{'items':>9} {'threads':>7} {'batch':>6} {'step':>9} {'clicks/s':>10} {'ms/step':>8} {'vs target':>10} "
          f"{'vs plain':>9} {'peak RSS GiB':>13} {'RSS growth MiB':>15}")
    plain = {(w.items, w.batch_size, w.threads): statistics.median(w.rates) for w in workers if w.step == "plain"}
    rows = []
    for w in workers:
        median = statistics.median(w.rates)
        base = plain.get((w.items, w.batch_size, w.threads))
        row = {
            "items": w.items,
            "threads": w.threads,
            "batch_size": w.batch_size,
            "step": w.step,
            "median_clicks_per_second": median,
            "ratio_to_target": median / TARGET_CLICKS_PER_SECOND,
            "ratio_to_plain": median / base if base else None,
            "median_ms_per_step": 1000.0 * w.batch_size / median,
            "window_clicks_per_second": w.rates,
            "peak_rss_bytes": w.memory["peak_rss_bytes"],
            "rss_growth_bytes": w.memory["rss_bytes"] - w.memory["after_warmup_rss_bytes"],
        }
        rows.append(row)
        vs_plain = f"{row['ratio_to_plain']:.2f}x" if base else "-"
        print(
            f"{w.items:>9,} {w.threads:>7} {w.batch_size:>6} {w.step:>9} {median:>10,.0f} {row['median_ms_per_step']:>8.1f} "
            f"{row['ratio_to_target']:>9.2f}x {vs_plain:>9} {_gib(row['peak_rss_bytes']):>13} "
            f"{row['rss_growth_bytes'] / 2**20:>15.1f}"
        )
    print(f"target: {TARGET_CLICKS_PER_SECOND:,.0f} clicks/s")
    if args.out is not None:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        report = {
            "benchmark": "training",
            "target_clicks_per_second": TARGET_CLICKS_PER_SECOND,
            "settings": {k: (str(v) if isinstance(v, Path) else v) for k, v in vars(args).items()},
            "machine": {"python": sys.version.split()[0], "torch": torch.__version__, "platform": platform.platform(),
                        "cpus": os.cpu_count()},
            "results": rows,
        }
        args.out.write_text(json.dumps(report, indent=2), encoding="utf-8")
        print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
