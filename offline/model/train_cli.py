"""`cairn train`: train the GRU next-click model on a prepared data set.

Writes DIR/epoch-NNN.pt after every epoch and DIR/best.pt (best validation MRR@20); each carries
the model config, every flag of this command and the validation metrics.
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path
from collections.abc import Callable
from typing import Any

import torch

from offline.data.dataset import PreparedData
from offline.model.gru import GRUConfig
from offline.model.losses import LOSS_NAMES
from offline.model.train import (
    ALL_ITEMS,
    AUTO,
    AUTO_ALL_UP_TO,
    AUTO_SAMPLED,
    BEST,
    OPTIMIZERS,
    TrainingError,
    TrainSettings,
    resolve_negatives,
    train,
)

# Learning rates when --lr is not given (common practice for each optimiser on this model).
DEFAULT_LR = {"adagrad": 0.05, "adam": 0.001}


def _number(kind: Callable[[str], Any], test: Callable[[Any], bool], wanted: str) -> Callable[[str], Any]:
    def parse(text: str) -> Any:
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not {wanted}") from None
        if not test(value):
            raise argparse.ArgumentTypeError(f"{text!r} is not {wanted}")
        return value

    return parse


_positive_int = _number(int, lambda v: v >= 1, "a positive integer")
_count = _number(int, lambda v: v >= 0, "an integer >= 0")
_positive_float = _number(float, lambda v: v > 0, "a number > 0")
_nonnegative_float = _number(float, lambda v: v >= 0, "a number >= 0")
_dropout = _number(float, lambda v: 0 <= v < 1, "a dropout rate in [0, 1)")


def _negatives(text: str) -> int | str:
    """'all', 'auto' or a count >= 0."""
    word = text.strip().lower()
    if word in (ALL_ITEMS, AUTO):
        return word
    try:
        return _count(text)
    except argparse.ArgumentTypeError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer >= 0, '{ALL_ITEMS}' or '{AUTO}'") from None


def _sizes(text: str) -> list[int]:
    """'' or '200,100' -> [] or [200, 100]."""
    parts = [p.strip() for p in text.split(",") if p.strip()]
    return [_positive_int(p) for p in parts]


def configure(parser: argparse.ArgumentParser) -> None:
    d = TrainSettings()
    parser.add_argument("--data", type=Path, required=True, metavar="DIR", help="prepared data set (cairn prepare --out)")
    parser.add_argument("--out", type=Path, default=Path("checkpoints/gru"), metavar="DIR",
                        help="where checkpoints go (default checkpoints/gru)")
    g = parser.add_argument_group("training")
    g.add_argument("--loss", choices=LOSS_NAMES, default=d.loss, help=f"ranking loss (default {d.loss})")
    g.add_argument("--negatives", type=_negatives, default=d.negatives, metavar="M",
                   help="extra sampled negatives per step beside the in-batch ones; 0 = in-batch only; "
                        f"'{ALL_ITEMS}' = every item, unsampled (small catalogues); '{AUTO}' = '{ALL_ITEMS}' up to "
                        f"{AUTO_ALL_UP_TO:,} items, else {AUTO_SAMPLED:,} (default {d.negatives})")
    g.add_argument("--negative-skew", type=_nonnegative_float, default=d.negative_skew, metavar="A",
                   help=f"negatives drawn by popularity**A: 0 uniform, 1 popularity (default {d.negative_skew})")
    g.add_argument("--score-penalty", type=_nonnegative_float, default=d.score_penalty, metavar="L",
                   help=f"BPR-max score regularisation (default {d.score_penalty})")
    g.add_argument("--logq-correction", action="store_true",
                   help="subtract log(sampling probability) from sampled candidates' scores before the loss "
                        "(Yi et al., RecSys 2019); no effect with --negatives all")
    g.add_argument("--optimizer", choices=OPTIMIZERS, default=d.optimizer, help=f"(default {d.optimizer})")
    g.add_argument("--lr", type=_positive_float, default=None,
                   help=f"learning rate (default {DEFAULT_LR['adagrad']} with adagrad, {DEFAULT_LR['adam']} with adam)")
    g.add_argument("--epochs", type=_positive_int, default=d.epochs, help=f"at most this many epochs (default {d.epochs})")
    g.add_argument("--batch-size", type=_positive_int, default=d.batch_size, metavar="B",
                   help=f"sessions side by side (default {d.batch_size})")
    g.add_argument("--patience", type=_count, default=d.patience, metavar="N",
                   help=f"stop after N epochs without a better validation MRR@20; 0 = never (default {d.patience})")
    g.add_argument("--valid-sessions", type=_count, default=d.valid_sessions, metavar="N",
                   help=f"validate on a seeded sample of at most N validation sessions, the same each epoch; 0 = all (default {d.valid_sessions:,})")
    g.add_argument("--seed", type=int, default=d.seed, help=f"seeds weights, dropout and sampling (default {d.seed})")
    g.add_argument("--threads", type=_positive_int, default=len(os.sched_getaffinity(0)),
                   help="torch CPU threads (default: the cores this process may use)")
    m = parser.add_argument_group("model")
    c = GRUConfig(n_items=1)
    m.add_argument("--embedding-size", type=_positive_int, default=c.embedding_size, help=f"(default {c.embedding_size})")
    m.add_argument("--hidden-size", type=_positive_int, default=c.hidden_size, help=f"(default {c.hidden_size})")
    m.add_argument("--layers", type=_positive_int, default=c.layers, help=f"stacked GRU layers (default {c.layers})")
    m.add_argument("--ff-sizes", type=_sizes, default=[], metavar="N,N",
                   help="tanh feed-forward layer sizes after the GRU, comma-separated (default none)")
    m.add_argument("--input-dropout", type=_dropout, default=c.input_dropout, metavar="P", help="(default 0)")
    m.add_argument("--state-dropout", type=_dropout, default=c.state_dropout, metavar="P", help="(default 0)")
    m.add_argument("--tie-output", action="store_true",
                   help="output item vectors = input embedding (needs the last layer size = --embedding-size)")


def run(args: argparse.Namespace) -> int:
    lr = args.lr if args.lr is not None else DEFAULT_LR[args.optimizer]
    last = args.ff_sizes[-1] if args.ff_sizes else args.hidden_size
    if args.tie_output and last != args.embedding_size:
        raise TrainingError(
            f"--tie-output needs the last layer size ({last}, from {'--ff-sizes' if args.ff_sizes else '--hidden-size'}) "
            f"to equal --embedding-size ({args.embedding_size})"
        )
    torch.set_num_threads(args.threads)
    data = PreparedData.load(args.data)
    config = GRUConfig(
        n_items=data.n_items,
        embedding_size=args.embedding_size,
        hidden_size=args.hidden_size,
        layers=args.layers,
        ff_sizes=list(args.ff_sizes),
        input_dropout=args.input_dropout,
        state_dropout=args.state_dropout,
        tie_output=args.tie_output,
    )
    settings = TrainSettings(
        loss=args.loss,
        negatives=resolve_negatives(args.negatives, data.n_items),
        negative_skew=args.negative_skew,
        score_penalty=args.score_penalty,
        logq_correction=args.logq_correction,
        optimizer=args.optimizer,
        lr=lr,
        epochs=args.epochs,
        batch_size=args.batch_size,
        patience=args.patience,
        valid_sessions=args.valid_sessions,
        seed=args.seed,
    )
    # Every flag, as JSON-friendly values, with the learning rate actually used.
    hyperparameters = {k: (str(v) if isinstance(v, Path) else v) for k, v in vars(args).items() if k != "command"}
    hyperparameters["lr"] = lr
    hyperparameters["negatives"] = settings.negatives  # what 'auto' became
    print(
        f"training on {data.train.n_clicks:,} clicks in {data.train.n_sessions:,} sessions, {data.n_items:,} items; "
        f"{args.loss}, {settings.negatives} negatives, batch {args.batch_size}, {args.optimizer} lr {lr}"
    )
    result = train(data, config, settings, args.out, hyperparameters=hyperparameters)
    best = result.best_metrics
    print(
        f"best: epoch {result.best_epoch}, valid MRR@20 {best['mrr@20']:.4f} Recall@20 {best['recall@20']:.4f} "
        f"-> {args.out / BEST}"
    )
    return 0
