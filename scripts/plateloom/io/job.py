"""What the entry scripts share: logging to the rule's log file and clear failure messages."""

from __future__ import annotations

import errno
import logging
import os
import sys
import traceback
from collections.abc import Callable

from plateloom.errors import InputError

FIXES = {
    errno.ENOSPC: "free space on that disk (or set results_dir to a larger one), then run again",
    errno.EDQUOT: "free space within your quota (or set results_dir elsewhere), then run again",
    errno.EACCES: "make the folder writable for you (or set results_dir elsewhere), then run again",
    errno.EROFS: "set results_dir to a writable disk, then run again",
}


def os_error_message(error: OSError) -> str:
    """One line for an operating-system error: the file, what happened, and the fix."""
    where = error.filename or "a file of this job"
    what = error.strerror or str(error)
    fix = FIXES.get(error.errno or -1, "check the file and the disk, then run again")
    return f"{where}: {what}. Fix: {fix} (finished jobs are kept)."


def run_step(log_path: str | None, step: Callable[[], None], name: str) -> None:
    """Run one workflow step with logging to ``log_path``.

    Bad input (InputError) ends the job with the message alone, naming file, well and fix; an
    operating-system error (a full disk, no permission) with one line naming the file and the
    fix; any other error is logged with its traceback and re-raised.
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
    except OSError as error:
        log.error("plateloom %s stopped: %s", name, os_error_message(error))
        sys.exit(1)
    except Exception:
        log.error("plateloom %s failed:\n%s", name, traceback.format_exc())
        raise
    log.info("done %s", name)
