"""Capacity from a stepped ramp: the highest rate that still meets the budget, per service core,
and what a target rate needs.

The ramp is read bottom up and stops at the first step that misses the budget: a later step that
happens to pass again (noise, a warm cache) is not trusted, because the rate below it did not hold.
The rate is the one the step achieved, not its target.
"""

from __future__ import annotations

import math
import os
from typing import Any

from service.errors import LoadTestError

REPORT_KIND = "cairn-capacity/1"


def check_sizing(service_cores: float, target_rate: float | None, headroom: float) -> None:
    if not service_cores > 0:
        raise LoadTestError(f"--service-cores must be positive, got {service_cores}")
    if target_rate is not None and not target_rate > 0:
        raise LoadTestError(f"--target-rate must be positive, got {target_rate}")
    if not 0 < headroom <= 1:
        raise LoadTestError(f"--headroom must lie in (0, 1], got {headroom}")


def find_capacity(report: dict[str, Any], service_cores: float, target_rate: float | None, headroom: float) -> dict[str, Any]:
    """The capacity section of a report whose steps are a ramp (service/load/loadtest.py)."""
    check_sizing(service_cores, target_rate, headroom)
    steps = report["steps"]
    best, failed = None, None
    for row in steps:
        if row["failures"]:
            failed = row
            break
        best = row
    out: dict[str, Any] = {
        "found": best is not None,
        "rate_rps": None,
        "step_target_rps": None,
        "service_cores": service_cores,
        "per_core_rps": None,
        "ramp_exhausted": failed is None,
        "first_failing_step": None if failed is None else failed["index"],
        "why": None if failed is None else f"step {failed['index']} ({failed['target_rps']:g} requests/s): " + "; ".join(failed["failures"]),
        "target_rate": target_rate,
        "headroom": headroom,
        "cores_needed": None,
        "cores_needed_at_full": None,
        "replicas_needed": None,
        "caveat": _caveat(report),
    }
    if best is None:
        return out
    rate = float(best["rps"])
    per_core = rate / service_cores
    out.update(rate_rps=rate, step_target_rps=best["target_rps"], per_core_rps=round(per_core, 4))
    if target_rate is not None:
        cores = math.ceil(target_rate / (per_core * headroom))
        out.update(
            cores_needed=cores,
            cores_needed_at_full=math.ceil(target_rate / per_core),
            replicas_needed=math.ceil(cores / service_cores),
        )
    return out


def _caveat(report: dict[str, Any]) -> str:
    cpus = report["load_generator"]["cpu_count"]
    text = f"measured on this machine ({cpus} CPU core(s), {_cpu_model()})"
    if report["target"]["served_here"]:
        text += ", with the load generator on the same machine, competing for its cores"
    text += (
        "; another CPU, another model size, a remote Redis or other traffic changes these numbers, so measure "
        "again on the hardware that will serve."
    )
    if report["load_generator"]["bottleneck"]:
        text += " The load generator ran out of CPU in some step, so the service may have more capacity than shown."
    return text


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return os.uname().machine
