"""The GRU's validation metrics by epoch, read from the per-epoch checkpoints `cairn train` writes
next to best.pt (epoch-001.pt, epoch-002.pt, ...; each holds its epoch's validation metrics)."""

from __future__ import annotations

from pathlib import Path


def validation_curve(checkpoint: Path) -> list[dict]:
    """[{"epoch": e, "mrr@20": ..., "recall@20": ...}] by epoch; empty when none can be read."""
    import torch  # only here: the rest of the report does not need it

    out = []
    for path in sorted(Path(checkpoint).parent.glob("epoch-*.pt")):
        try:
            extra = torch.load(path, map_location="cpu", weights_only=True).get("extra", {})
        except Exception:  # noqa: BLE001 - a damaged or foreign file leaves a gap in the plot, not a failed report
            continue
        valid = extra.get("valid") if isinstance(extra, dict) else None
        if isinstance(valid, dict) and isinstance(extra.get("epoch"), int):
            out.append({"epoch": extra["epoch"], **{k: float(v) for k, v in valid.items() if k != "events" and isinstance(v, (int, float))}})
    return sorted(out, key=lambda r: r["epoch"])
