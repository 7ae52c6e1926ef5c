"""Training speed: clicks per second of the session-parallel loop, several batch sizes side by side.

    python -m bench.training [--out reports/bench/training.json]

Synthetic data of our own (a 40,000-item catalogue with Zipf-like popularity, sessions of a few
clicks) and the full training step: sampled output with 2,048 extra negatives, the loss, backward
and the sparse optimiser update. Each batch size, with one thread and with all cores, runs a few
timed windows of steps after a warm-up, the windows of all configurations taken in turn; the
median window is compared with the target of 20,000 clicks/s at hidden size 100.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from offline.model.session_batches import NegativeSampler, SessionParallelBatches, Step, sampling_weights
from offline.data.dataset import SessionSplit
from offline.model.gru import GRUConfig, NextClickGRU
from offline.model.losses import LOSS_NAMES, LossFn, get_loss
from offline.model.train import build_optimizers, keep_freed_memory, train_epoch

TARGET_CLICKS_PER_SECOND = 20_000.0


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


@dataclass
class _Run:
    """One configuration under test: its own model, optimiser state, sampler and place in the epoch."""

    batch_size: int
    threads: int
    model: NextClickGRU
    optimizers: list[torch.optim.Optimizer]
    sampler: NegativeSampler
    steps: Iterator[Step]
    rates: list[float] = field(default_factory=list)


def _start(split: SessionSplit, n_items: int, batch_size: int, threads: int, args: argparse.Namespace) -> _Run:
    torch.manual_seed(args.seed)
    model = NextClickGRU(GRUConfig(n_items=n_items, embedding_size=args.hidden_size, hidden_size=args.hidden_size))
    counts = np.bincount(split.items, minlength=n_items)
    return _Run(
        batch_size=batch_size,
        threads=threads,
        model=model,
        optimizers=build_optimizers(model, args.optimizer, args.lr),
        sampler=NegativeSampler(sampling_weights(counts, args.negative_skew), args.negatives, seed=args.seed),
        steps=iter(SessionParallelBatches(split, batch_size)),
    )


def _window(run: _Run, loss_fn: LossFn, n_steps: int) -> float:
    torch.set_num_threads(run.threads)
    stats = train_epoch(run.model, run.steps, run.sampler, loss_fn, run.optimizers, run.batch_size, max_steps=n_steps)
    if stats.steps < n_steps:
        raise SystemExit(f"synthetic data ran out at batch size {run.batch_size}; raise --sessions")
    return stats.clicks_per_second


def _ints(text: str) -> list[int]:
    return [int(x) for x in text.split(",") if x.strip()]


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.training", description=__doc__.split("\n")[0])
    p.add_argument("--out", type=Path, default=None, help="write the results as JSON here")
    p.add_argument("--batch-sizes", type=_ints, default=[128, 256, 512], help="comma-separated (default 128,256,512)")
    p.add_argument("--threads", type=_ints, default=sorted({1, len(os.sched_getaffinity(0))}),
                   help="torch thread counts to compare, comma-separated (default 1 and all cores)")
    p.add_argument("--items", type=int, default=40_000, help="catalogue size (default 40000)")
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
    args = p.parse_args(argv)
    keep_freed_memory()
    torch.sparse.check_sparse_tensor_invariants.disable()  # see offline.model.train

    split = synthetic_split(args.items, args.sessions, args.seed)
    loss_fn = get_loss(args.loss)
    print(
        f"training speed: {args.items:,} items, {split.n_sessions:,} sessions / {split.n_clicks:,} clicks, "
        f"hidden {args.hidden_size}, {args.negatives} negatives (alpha {args.negative_skew}), {args.loss}, "
        f"{args.optimizer}; median of {args.windows} windows x {args.steps} steps, windows interleaved"
    )
    runs = [_start(split, args.items, b, t, args) for t in args.threads for b in args.batch_sizes]
    for run in runs:
        _window(run, loss_fn, args.warmup)
    # Round-robin windows: a burst of load from elsewhere on the machine hits every configuration
    # alike instead of whichever one happened to be running, so the medians stay comparable.
    for _ in range(args.windows):
        for run in runs:
            run.rates.append(_window(run, loss_fn, args.steps))
    print(f"{'threads':>7} {'batch':>6} {'clicks/s':>10} {'ms/step':>8} {'vs target':>10}")
    rows = []
    for run in runs:
        median = statistics.median(run.rates)
        row = {
            "threads": run.threads,
            "batch_size": run.batch_size,
            "median_clicks_per_second": median,
            "ratio_to_target": median / TARGET_CLICKS_PER_SECOND,
            "median_ms_per_step": 1000.0 * run.batch_size / median,
            "window_clicks_per_second": run.rates,
        }
        rows.append(row)
        print(
            f"{run.threads:>7} {run.batch_size:>6} {median:>10,.0f} {row['median_ms_per_step']:>8.1f} "
            f"{row['ratio_to_target']:>9.2f}x"
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
