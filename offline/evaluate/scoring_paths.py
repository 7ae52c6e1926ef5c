"""The names of the service's scoring paths as the offline tools take them (no onnxruntime import:
`cairn evaluate` checks its options before it loads anything)."""

from __future__ import annotations

SCORING_PATHS = ("exact", "fp16", "int8", "int4", "int4+int8", "clustered")  # CAIRN_SCORING's paths, auto aside: a row names the path it measured


def parse_scoring(text: str) -> tuple[str, int]:
    """`clustered@32` -> ("clustered", 32); `int8` -> ("int8", 0); ValueError naming the text otherwise."""
    scoring, _, probe = text.partition("@")
    if scoring not in SCORING_PATHS or (probe and (scoring != "clustered" or not probe.isdigit() or int(probe) < 1)):
        raise ValueError(f"expected one of {', '.join(SCORING_PATHS)} or clustered@N, got {text!r}")
    return scoring, int(probe or 0)
