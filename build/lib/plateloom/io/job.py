"""What the entry scripts share: logging to the rule's log file and clear failure messages."""

from __future__ import annotations

import logging
import os
import sys
import traceback
from collections.abc import Callable

from plateloom.errors import InputError


def run_step(log_path: str | None, step: Callable[[], None], name: str) -> None:
    """Run one workflow step with logging to ``log_path``.

    Bad input (InputError) ends the job with the message alone, naming file, well and fix;
    any other error is logged with its traceback and re-raised.
    """
    handlers: list[logging.Handler] = [logging.StreamHandler(sys.stderr)]
    if log_path:
        os.makedirs(os.path.dirname(log_path) or ".", exist_ok=True)
        handlers.append(logging.FileHandler(log_path, mode="w", encoding="utf-8"))
    logging.basicConfig(
        level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s", handlers=handlers, force=True
    )
    log = logging.getLogger("plateloom")
    log.info("start %s", name)
    try:
        step()
    except InputError as error:
        log.error("plateloom %s stopped on bad input: %s", name, error)
        sys.exit(1)
    except Exception:
        log.error("plateloom %s failed:\n%s", name, traceback.format_exc())
        raise
    log.info("done %s", name)
