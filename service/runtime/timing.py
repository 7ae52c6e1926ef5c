"""Time spent per part of one request, for the Server-Timing header and the metrics."""

from __future__ import annotations

import time
from dataclasses import dataclass, field


@dataclass
class Timing:
    started: float = field(default_factory=time.perf_counter)
    store_s: float = 0.0
    model_s: float = 0.0  # the model as the request saw it: queue, thread hand-over, replay, scoring
    step_s: float = 0.0  # of that, ONNX Runtime's call that scored this click
    scoring: str = ""  # which scoring path the GRU took (exact | fp16 | int8 | int4 | clustered); empty when it did not answer
