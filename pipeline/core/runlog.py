"""The run's log: a file per run under OUT/logs, and the console.

Kept apart from the runner so the no-change check can log without importing pyarrow.
"""

from __future__ import annotations

import logging
import os
import time
from pathlib import Path

from pipeline.core import names


def setup_logging(out: Path, command: str) -> tuple[logging.Logger, Path]:
    logs = out / names.LOGS
    logs.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime())
    log_path = logs / f"{command}-{stamp}-{os.getpid()}.log"
    logger = logging.getLogger("loam")
    logger.setLevel(logging.INFO)
    for handler in list(logger.handlers):
        logger.removeHandler(handler)
        handler.close()
    file_handler = logging.FileHandler(log_path, encoding="utf-8")
    file_handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    logger.addHandler(file_handler)
    console = logging.StreamHandler()
    console.setFormatter(logging.Formatter("%(message)s"))
    logger.addHandler(console)
    logger.propagate = False
    return logger, log_path
