"""Glue for the thin scripts in scripts/: logging, clean failures and provenance records.

Scripts call ``run_job(snakemake, func, **kwargs)``. The job's messages go to its Snakemake log;
a TesseraInputError is written to the log *and* the console as one line (no traceback), so the
user sees which file and field to fix without opening the log. When the job succeeds, its
provenance record (inputs and outputs with checksums, params, code version, host, times) is
written under ``results/provenance/`` (see :func:`tessera.provenance.job_record`).
"""

import json
import logging
import os
import sys
import time
from datetime import datetime, timezone
from pathlib import Path


def run_job(job, func, /, **kwargs):
    """Run ``func(**kwargs)`` for a Snakemake job; exit 1 with a one-line message on bad input.

    `job` is the ``snakemake`` object of a script (its log gets the messages and a provenance
    record is written on success) or, outside Snakemake, a log path (no record).
    """
    from .errors import TesseraInputError

    log_path = job if isinstance(job, (str, os.PathLike)) else job.log[0]
    started = datetime.now(timezone.utc)

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
    if not isinstance(job, (str, os.PathLike)):
        from .provenance import write_job_record

        record = write_job_record(job, started=started, finished=datetime.now(timezone.utc),
                                  workflow_dir=Path(job.scriptdir).parent)
        log.info("provenance record: %s", record)
    return result
