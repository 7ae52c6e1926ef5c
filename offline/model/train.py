"""Training the GRU next-click model: session-parallel mini-batches, sampled output, ranking loss.

Reads top to bottom: settings, optimisers, one epoch, validation, the epoch loop with early
stopping and checkpoints. The recipe is Hidasi et al. (ICLR 2016) with the sampled output and
losses of Hidasi and Karatzoglou (CIKM 2018):
  * each step scores its B targets against each other plus M items drawn by popularity**alpha,
    so a step reads B + M output rows instead of all n_items (or, `negatives = ALL_ITEMS`, each
    target is scored against every other item: exact, and affordable for a few thousand items);
    repeats among the sampled items are scored once and counted per copy (step_columns);
  * embedding and output tables get sparse gradients, so an optimiser step updates only those
    rows (a dense update of a 40,000-row table alone costs tens of ms);
  * the hidden state is carried from step to step and detached (one-step truncated BPTT, as in
    the 2016 paper), and zeroed in a slot when a new session takes it.
"""

from __future__ import annotations

import ctypes
import itertools
import json
import math
import shutil
import time
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import torch
from tqdm import tqdm

from service.errors import InputDataError, TrainingError
from offline.model.session_batches import EveryItem, NegativeSampler, SessionParallelBatches, Step, candidate_log_q, sampling_weights
from offline.data.dataset import PreparedData, SessionSplit
from offline.evaluate.next_clicks import iterate_events, target_ranks
from offline.model.gru import GRUConfig, NextClickGRU, save_checkpoint, score_rows
from offline.evaluate.gru_scorer import TorchGRUScorer
from offline.model.losses import LOSS_NAMES, LossFn, get_loss, logq_corrected, negative_mask
from offline.model.progress import LineProgress, epoch_progress
from offline.model.row_adagrad import RowAdagrad
from offline.model.step_columns import merge_columns
from offline.model.step_rows import StepRows

OPTIMIZERS = ("adagrad", "adam")
ALL_ITEMS = "all"  # TrainSettings.negatives: every item is a negative of every row (EveryItem)
AUTO = "auto"  # TrainSettings.negatives: ALL_ITEMS for a catalogue of up to AUTO_ALL_UP_TO items, else AUTO_SAMPLED
# Up to 4,096 items, scoring every item costs a step at most about twice what 2,048 sampled
# negatives do (B + n_items against B + 2,048 candidates at B = 256), and it is exact: on the demo
# shop (2,479 items) it lifted BPR-max's best validation Recall@20 from 0.44 (2,048 negatives
# drawn by popularity**0.75) and 0.50 (drawn uniformly) to 0.52, at about the same cost per click.
AUTO_ALL_UP_TO = 4_096
AUTO_SAMPLED = 2_048
CUTOFF = 20  # validation ranks the target among all items; MRR@20 is the early-stopping metric
VALID_BATCH = 512  # validation sessions side by side: one [512, n_items] score matrix at a time
BEST = "best.pt"
EPOCH_LOG = "training_log.jsonl"  # one JSON object per epoch, beside the checkpoints; readable without torch
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # mallopt() parameters, from glibc's malloc.h



@dataclass
class TrainSettings:
    loss: str = "bpr-max"  # one of LOSS_NAMES
    negatives: int | str = AUTO  # extra sampled negatives per step, shared by the batch; 0 = in-batch only; ALL_ITEMS; AUTO
    negative_skew: float = 0.75  # negatives drawn by popularity**alpha: 0 uniform, 1 popularity
    score_penalty: float = 1.0  # BPR-max score regularisation lambda
    optimizer: str = "adagrad"  # adagrad | adam (SparseAdam for the item tables, Adam for the rest)
    lr: float = 0.05
    epochs: int = 10
    batch_size: int = 256  # sessions side by side
    patience: int = 3  # stop after this many epochs without a better validation MRR@20; 0 never stops early
    seed: int = 0  # seeds the weights, dropout and negative sampling
    # Subtract log(how often an item is a candidate) from its score before the loss (Yi et al.,
    # RecSys 2019); only sampled negatives need it: with ALL_ITEMS there is no sampling bias.
    logq_correction: bool = False
    # Validation ranks every item for every click: at 631,430 items, 405,000 validation clicks took
    # 40 minutes an epoch. A seeded sample of this many validation sessions (the same every epoch)
    # keeps early stopping affordable; 0 = every session.
    valid_sessions: int = 20_000

    def validate(self) -> None:
        if self.loss not in LOSS_NAMES:
            raise TrainingError(f"unknown loss {self.loss!r}; expected one of {', '.join(LOSS_NAMES)}")
        if self.optimizer not in OPTIMIZERS:
            raise TrainingError(f"unknown optimizer {self.optimizer!r}; expected one of {', '.join(OPTIMIZERS)}")
        checks = [
            ("negatives", self.negatives in (ALL_ITEMS, AUTO) or (isinstance(self.negatives, int) and self.negatives >= 0)),
            ("negative_skew", self.negative_skew >= 0),
            ("score_penalty", self.score_penalty >= 0),
            ("lr", self.lr > 0),
            ("epochs", self.epochs >= 1),
            ("batch_size", self.batch_size >= 1),
            ("patience", self.patience >= 0),
            ("valid_sessions", self.valid_sessions >= 0),
        ]
        for name, ok in checks:
            if not ok:
                raise TrainingError(f"{name} = {getattr(self, name)!r} is out of range")


@dataclass
class EpochStats:
    loss: float  # mean batch loss
    steps: int
    clicks: int  # input/target pairs trained on
    seconds: float

    @property
    def clicks_per_second(self) -> float:
        return self.clicks / self.seconds if self.seconds > 0 else 0.0


@dataclass
class TrainResult:
    best_epoch: int
    best_metrics: dict[str, float]
    history: list[dict[str, Any]] = field(default_factory=list)  # one record per epoch


def keep_freed_memory() -> None:
    """Ask glibc to keep freed blocks of up to 32 MiB for reuse instead of returning them to the OS.

    A training step allocates a dozen [B, B + M] temporaries (5 MB each at B = 512). By default
    glibc hands much of that back to the OS between steps (large blocks are separate mappings,
    the heap top is trimmed), so the next step page-faults it in again. Measured on one thread at
    batch 512 with 2,048 negatives: 1,500-6,900 page faults and 23-43 ms a step without this,
    none and 21 ms with it. Process-wide and harmless elsewhere; a no-op off glibc.
    """
    try:
        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(_M_MMAP_THRESHOLD, 32 << 20)  # 32 MiB: glibc's ceiling for this knob on 64-bit
        libc.mallopt(_M_TRIM_THRESHOLD, 128 << 20)
    except (OSError, AttributeError):
        pass


def build_optimizers(model: NextClickGRU, name: str, lr: float) -> list[torch.optim.Optimizer]:
    """Adagrad: RowAdagrad for every parameter (torch's rule, on the touched rows of the sparse item
    tables, in one fused kernel call); Adam needs SparseAdam for the item tables. Both read the
    coalesced gradients of step_rows."""
    sparse_ids = {id(m.weight) for m in model.modules() if isinstance(m, torch.nn.Embedding) and m.sparse}
    sparse = [p for p in model.parameters() if id(p) in sparse_ids]
    dense = [p for p in model.parameters() if id(p) not in sparse_ids]
    if name == "adagrad":
        return [RowAdagrad([*sparse, *dense], lr=lr)]
    return [torch.optim.SparseAdam(sparse, lr=lr), torch.optim.Adam(dense, lr=lr)]


def train_epoch(
    model: NextClickGRU,
    steps: Iterable[Step],
    sampler: NegativeSampler | EveryItem,
    loss_fn: LossFn,
    optimizers: list[torch.optim.Optimizer],
    batch_size: int,
    max_steps: int | None = None,
    progress: tqdm | LineProgress | None = None,
    log_q: torch.Tensor | None = None,
) -> EpochStats:
    """One pass over `steps` (or its first `max_steps`); the model is left in train mode.

    `log_q` float32 [n_items] (candidate_log_q): the log-Q correction of each candidate's score."""
    model.train()
    b = batch_size
    params = [p for opt in optimizers for group in opt.param_groups for p in group["params"]]
    hidden = model.init_hidden(b)  # [L, B, H]
    loss_sum = torch.zeros(())  # summed without .item() per step
    n_steps = 0
    start = time.perf_counter()
    for step in steps if max_steps is None else itertools.islice(steps, max_steps):
        inputs = torch.from_numpy(step.inputs)  # [B]
        targets = torch.from_numpy(step.targets)  # [B]
        if step.reset.any():
            hidden = hidden.masked_fill(torch.from_numpy(step.reset).view(1, b, 1), 0.0)  # [L, B, H]
        if sampler.in_batch:  # the targets, then each other sampled item once, counted per copy (step_columns)
            columns = merge_columns(targets, sampler.draw())
            candidates, negatives, counts = columns.items, columns.negatives, columns.counts  # [C], [B, C], [C]
            distinct: tuple[torch.Tensor, torch.Tensor] | None = (columns.rows, columns.inverse)
        else:  # every item once after the targets: nothing to merge
            candidates = torch.cat([targets, sampler.draw()])  # [B + n_items]
            negatives, counts, distinct = negative_mask(targets, candidates, in_batch=False), None, None
        rows = StepRows(model, inputs, candidates, distinct)  # the item-table rows this step reads, see step_rows
        features, hidden = model.recur(rows.embedded, hidden, hand_backward=True)  # [B, D], [L, B, H]
        scores = score_rows(features, rows.weights, rows.bias)  # [B, C]
        if log_q is not None:
            scores = logq_corrected(scores, log_q[candidates])
        loss = loss_fn(scores, negatives, counts)
        for p in params:  # zero_grad(set_to_none=True), without its per-call overhead (no hooks are registered)
            p.grad = None
        loss.backward()
        rows.hand_over()
        for opt in optimizers:
            if isinstance(opt, RowAdagrad):
                opt.step(gathered=rows.gathered())  # the rows StepRows read, updated in place: no second gather
            else:
                opt.step()
        hidden = hidden.detach()
        loss_sum += loss.detach()
        n_steps += 1
        if progress is not None:
            progress.update(b)
            if n_steps % 50 == 0:
                progress.set_postfix(loss=f"{loss_sum.item() / n_steps:.4f}", refresh=False)
    seconds = time.perf_counter() - start
    mean_loss = loss_sum.item() / n_steps if n_steps else float("nan")
    return EpochStats(loss=mean_loss, steps=n_steps, clicks=n_steps * b, seconds=seconds)


def validate(
    model: NextClickGRU, split: SessionSplit, cutoff: int = CUTOFF, progress: tqdm | LineProgress | None = None
) -> dict[str, float]:
    """MRR@cutoff and Recall@cutoff of the next click over `split`, every item ranked."""
    scorer = TorchGRUScorer(model, "gru")
    events, hits, reciprocal = 0, 0, 0.0
    for batch in iterate_events(scorer, split, batch_size=VALID_BATCH):
        ranks = target_ranks(batch.scores, batch.targets)  # [m]
        top = ranks <= cutoff
        events += len(ranks)
        hits += int(top.sum())
        reciprocal += float((1.0 / ranks[top]).sum())
        if progress is not None:
            progress.update(len(ranks))
    model.train()
    if events == 0:
        return {f"mrr@{cutoff}": 0.0, f"recall@{cutoff}": 0.0, "events": 0}
    return {f"mrr@{cutoff}": reciprocal / events, f"recall@{cutoff}": hits / events, "events": events}


def resolve_negatives(negatives: int | str, n_items: int) -> int | str:
    """AUTO -> ALL_ITEMS or AUTO_SAMPLED for a catalogue of `n_items`; any other value as it is."""
    if negatives != AUTO:
        return negatives
    return ALL_ITEMS if n_items <= AUTO_ALL_UP_TO else AUTO_SAMPLED


def make_sampler(data: PreparedData, settings: TrainSettings) -> NegativeSampler | EveryItem:
    negatives = resolve_negatives(settings.negatives, data.n_items)
    if negatives == ALL_ITEMS:
        return EveryItem(data.n_items)
    counts = np.bincount(data.train.items, minlength=data.n_items)  # [n_items] training clicks
    return NegativeSampler(sampling_weights(counts, settings.negative_skew), int(negatives), seed=settings.seed)


def make_log_q(data: PreparedData, settings: TrainSettings, sampler: NegativeSampler | EveryItem) -> torch.Tensor | None:
    """The log-Q correction per item when `settings.logq_correction` asks for it and negatives are sampled."""
    if not settings.logq_correction or isinstance(sampler, EveryItem):
        return None
    counts = np.bincount(data.train.items, minlength=data.n_items)  # [n_items] training clicks
    weights = sampling_weights(counts, settings.negative_skew)
    return candidate_log_q(counts, weights, settings.batch_size, sampler.n_negatives)


def check_data(data: PreparedData, batch_size: int) -> None:
    """Refuse a data set that cannot train or validate, naming what is wrong."""
    for name in ("train", "valid"):
        split = data.split(name)
        if split.n_clicks == 0:
            continue
        low, high = int(split.items.min()), int(split.items.max())
        if low < 0 or high >= data.n_items:
            bad = low if low < 0 else high
            raise InputDataError(f"{name} split has item index {bad} outside 0..{data.n_items - 1} (item_ids.json)")
    trainable = int((data.train.lengths() >= 2).sum())
    if trainable < batch_size:
        raise InputDataError(
            f"--batch-size {batch_size} is larger than the {trainable} training sessions of two or more clicks"
        )
    if not (data.valid.lengths() >= 2).any():
        raise InputDataError("valid split has no session of two or more clicks: nothing to early-stop on")


def append_epoch_log(path: Path, record: dict[str, Any]) -> None:
    """One line per epoch: epoch, train_loss, train_clicks, clicks_per_second, valid {metric: value},
    seconds, finished_at (UTC). Appended, so a run stopped half way still left its epochs."""
    line = {**record, "finished_at": datetime.now(timezone.utc).isoformat(timespec="seconds")}
    with open(path, "a", encoding="utf-8") as f:
        f.write(json.dumps(line) + "\n")


def read_epoch_log(path: Path) -> list[dict[str, Any]]:
    """The records `append_epoch_log` wrote (no torch needed)."""
    return [json.loads(line) for line in Path(path).read_text(encoding="utf-8").splitlines() if line.strip()]


def train(
    data: PreparedData,
    config: GRUConfig,
    settings: TrainSettings,
    out: Path,
    hyperparameters: dict[str, Any] | None = None,
    progress: bool | None = None,
    log: Callable[[str], None] = print,
) -> TrainResult:
    """Train, validate each epoch, write out/epoch-NNN.pt and out/best.pt (best validation MRR@20).

    `hyperparameters` is stored in every checkpoint (the CLI passes all its flags); `progress`
    None shows the bar only on a terminal.
    """
    settings.validate()
    try:
        config.validate()
    except ValueError as exc:
        raise TrainingError(str(exc)) from exc
    if config.n_items != data.n_items:
        raise TrainingError(f"model has n_items={config.n_items} but the data set has {data.n_items} items")
    check_data(data, settings.batch_size)
    out = Path(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
        (out / EPOCH_LOG).unlink(missing_ok=True)  # this run's epochs only
    except OSError as exc:
        raise TrainingError(f"cannot write checkpoints into {out}: {exc.strerror or exc}") from exc
    hyperparameters = hyperparameters or {**asdict(settings), **asdict(config)}
    metric = f"mrr@{CUTOFF}"

    keep_freed_memory()
    # Opting out explicitly: our sparse gradients come from nn.Embedding, valid by construction,
    # and an implicit opt-out makes the sparse optimisers warn on every run.
    torch.sparse.check_sparse_tensor_invariants.disable()
    torch.manual_seed(settings.seed)
    model = NextClickGRU(config)
    optimizers = build_optimizers(model, settings.optimizer, settings.lr)
    loss_fn = get_loss(settings.loss, settings.score_penalty)
    batches = SessionParallelBatches(data.train, settings.batch_size)
    sampler = make_sampler(data, settings)
    log_q = make_log_q(data, settings, sampler)
    if settings.logq_correction and log_q is None:
        log("--logq-correction: every item is a negative (no sampling), so there is nothing to correct")
    fingerprint = data.fingerprint()

    valid = data.valid.sample(settings.valid_sessions, settings.seed)
    if valid.n_sessions < int((data.valid.lengths() >= 2).sum()):
        log(f"validating on {valid.n_sessions:,} of {data.valid.n_sessions:,} validation sessions, the same each epoch (--valid-sessions)")
    valid_events = int((valid.lengths() - 1).clip(min=0).sum())

    result = TrainResult(best_epoch=0, best_metrics={})
    best_value, since_best = -math.inf, 0
    for epoch in range(1, settings.epochs + 1):
        epoch_started = time.perf_counter()
        with epoch_progress(batches.n_events, f"epoch {epoch}", progress) as bar:
            stats = train_epoch(model, batches, sampler, loss_fn, optimizers, settings.batch_size, progress=bar, log_q=log_q)
        if not math.isfinite(stats.loss):
            raise TrainingError(f"training loss became {stats.loss} in epoch {epoch}; try a smaller --lr")
        with epoch_progress(valid_events, f"epoch {epoch} validation", progress) as bar:
            metrics = validate(model, valid, progress=bar)
        record = {
            "epoch": epoch,
            "train_loss": stats.loss,
            "train_clicks": stats.clicks,
            "clicks_per_second": stats.clicks_per_second,
            "valid": metrics,
        }
        result.history.append(record)
        append_epoch_log(out / EPOCH_LOG, {**record, "seconds": round(time.perf_counter() - epoch_started, 3)})
        extra = {
            "epoch": epoch,
            "hyperparameters": hyperparameters,
            "valid": metrics,
            "train": {k: record[k] for k in ("train_loss", "train_clicks", "clicks_per_second")},
            "data_fingerprint": fingerprint,
        }
        path = out / f"epoch-{epoch:03d}.pt"
        save_checkpoint(path, model, extra)
        improved = metrics[metric] > best_value
        if improved:
            best_value, since_best = metrics[metric], 0
            result.best_epoch, result.best_metrics = epoch, metrics
            tmp = out / (BEST + ".tmp")
            shutil.copyfile(path, tmp)
            tmp.replace(out / BEST)  # a reader never sees half a best.pt
        else:
            since_best += 1
        log(
            f"epoch {epoch}: loss {stats.loss:.4f}, {stats.clicks_per_second:,.0f} clicks/s, "
            f"valid MRR@{CUTOFF} {metrics[metric]:.4f} Recall@{CUTOFF} {metrics[f'recall@{CUTOFF}']:.4f}"
            + (" (best)" if improved else "")
        )
        if settings.patience and since_best >= settings.patience:
            log(f"no better validation MRR@{CUTOFF} for {since_best} epochs: stopping early")
            break
    return result
