"""Glue for the thin scripts in scripts/: logging, clean failures and provenance records.

Scripts call ``run_job(snakemake, func, **kwargs)`` (or with the log path in place of
``snakemake``). The job's messages go to its Snakemake log; a TesseraInputError is written to the
log *and* the console as one line (no traceback), so the user sees which file and field to fix
without opening the log. Running out of memory is one such line too, naming the rule, its
``mem_mb`` and the profile key that raises it. When the job succeeds, its provenance
record (inputs and outputs with checksums, params, code version, host, times) is written under
``results/provenance/`` (see :func:`tessera.workflow.provenance.job_record`).
"""

import json
import logging
import os
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.workflow.provenance import write_job_record
from tessera.workflow.resources import job_info, out_of_memory_message

#: Exit status of a job stopped by Ctrl-C (128 + SIGINT, as shells report it).
INTERRUPTED_STATUS = 130


def run_job(job, func, /, **kwargs):
    """Run ``func(**kwargs)`` with logging to the job's log; exit 1 with a one-line message on bad
    input or when memory runs out, and 130 with one line when interrupted (Ctrl-C).

    `job` is the script's ``snakemake`` object (log, rule and ``mem_mb`` are read from it, so an
    out-of-memory message can name them, and a provenance record is written on success) or,
    outside Snakemake, a log path (no record).
    """
    try:
        return _run_logged(job, func, kwargs)
    except KeyboardInterrupt:
        # the job's outputs are incomplete: Snakemake removes them and the next run redoes it
        logging.getLogger("tessera").error("interrupted")
        print("tessera: interrupted (Ctrl-C); the next run redoes this job", file=sys.stderr)
        raise SystemExit(INTERRUPTED_STATUS) from None


def _run_logged(job, func, kwargs):
    info = job_info(job)
    started = datetime.now(UTC)
    handler = logging.FileHandler(info.log, mode="w", encoding="utf-8")
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
    except MemoryError as error:  # numpy: "Unable to allocate ..."
        message = out_of_memory_message(info, error)
        log.error("%s", message)
        print(f"tessera: {message}", file=sys.stderr)
        raise SystemExit(1) from None
    except Exception:
        log.exception("unexpected failure")
        raise
    finally:
        handler.flush()
    log.info("done in %.2f s: %s", time.perf_counter() - start, json.dumps(result, default=str))
    if not isinstance(job, (str, os.PathLike)):
        record = write_job_record(
            job,
            started=started,
            finished=datetime.now(UTC),
            workflow_dir=Path(job.scriptdir).parent,
        )
        log.info("provenance record: %s", record)
    return result
