"""Glue for the thin scripts in scripts/: logging and clean failures.

Scripts call ``run_job(log_path, func, **kwargs)``. The job's messages go to its Snakemake log;
a TesseraInputError is written to the log *and* the console as one line (no traceback), so the
user sees which file and field to fix without opening the log.
"""

import json
import logging
import sys
import time


def run_job(log_path, func, /, **kwargs):
    """Run ``func(**kwargs)`` with logging to `log_path`; exit 1 with a one-line message on bad input."""
    from .errors import TesseraInputError

    handler = logging.FileHandler(log_path, mode="w", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    root = logging.getLogger()
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    log = logging.getLogger("tessera")
    log.info("%s(%s)", func.__name__, json.dumps(kwargs, default=str))
    start = time.perf_counter()
    try:
        result = func(**kwargs)
    except TesseraInputError as error:
        log.error("%s", error)
        print(f"tessera: {error}", file=sys.stderr)
        raise SystemExit(1) from None
    except Exception:
        log.exception("unexpected failure")
        raise
    finally:
        handler.flush()
    log.info("done in %.2f s: %s", time.perf_counter() - start, json.dumps(result, default=str))
    return result
