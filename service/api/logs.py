"""How every cairn process logs: one line per record with time, level, logger and process id.

`cairn serve` sets this up before uvicorn starts; with --workers N uvicorn spawns fresh worker
processes that inherit none of it, so each worker sets it up again from the same settings (without
this, a worker's records lost their time and level and its INFO lines vanished).
"""

from __future__ import annotations

import logging

FORMAT = "%(asctime)s %(levelname)s %(name)s[%(process)d]: %(message)s"


def configure_logging(level: str) -> None:
    logging.basicConfig(level=level.upper(), format=FORMAT, force=True)
