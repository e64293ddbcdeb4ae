"""What a job was given (rule, memory) and what to tell the user when that is not enough.

Snakemake passes every script a ``snakemake`` object holding the rule name and the job's
resources; :func:`job_info` reads the two facts the messages need from it. Rules declare
``mem_mb`` through ``scaled_by_attempt`` (rules/common.smk), so a job can be given more memory
in two ways, and every message names both: a per-rule figure in the profile's config.yaml
(``set-resources``), or ``--retries``, which reruns a failed job with ``mem_mb`` multiplied by
the attempt number.
"""

import ctypes
import ctypes.util
import os
from dataclasses import dataclass

# mallopt(3) parameters of glibc's allocator (malloc.h)
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_MMAP_THRESHOLD = 32 * 2**20  # the largest threshold glibc's own adjustment reaches (64-bit)
_TRIM_THRESHOLD = 2**30


@dataclass(frozen=True)
class JobInfo:
    """The facts about a running job that error messages name.

    Parameters
    ----------
    log : str
        The job's log file.
    rule : str, optional
        The Snakemake rule the job belongs to.
    mem_mb : int, optional
        The memory (MB) the job was given.

    Examples
    --------
    >>> JobInfo("logs/stitch/d1_mito.log", "stitch", 2000).mem_mb
    2000
    """

    log: str
    rule: str | None = None
    mem_mb: int | None = None


def job_info(job):
    """A :class:`JobInfo` from a script's ``snakemake`` object, or from a bare log path.

    Parameters
    ----------
    job : object or str or PathLike
        The ``snakemake`` object Snakemake gives a script (``log``, ``rule`` and
        ``resources.mem_mb`` are read), or the job's log path.

    Returns
    -------
    JobInfo

    Examples
    --------
    >>> job_info("logs/ingest/a1.log")
    JobInfo(log='logs/ingest/a1.log', rule=None, mem_mb=None)
    """
    if isinstance(job, (str, os.PathLike)):
        return JobInfo(log=os.fspath(job))
    mem_mb = getattr(getattr(job, "resources", None), "mem_mb", None)
    return JobInfo(
        log=str(job.log[0]),
        rule=getattr(job, "rule", None),
        mem_mb=None if mem_mb is None else int(mem_mb),
    )


def more_memory_hint(rule, *, suggest_mb=None):
    """Where to give `rule` more memory: the profile key, or retries (which scale ``mem_mb``).

    Parameters
    ----------
    rule : str or None
        The rule; ``<rule>`` in the text when unknown.
    suggest_mb : int, optional
        The figure to suggest; ``<MB>`` in the text when not given.

    Returns
    -------
    str

    Examples
    --------
    >>> more_memory_hint("stitch", suggest_mb=4000)
    "give it more in the profile's config.yaml (set-resources: {stitch: {mem_mb: 4000}}) or rerun with --retries 1 (each retry multiplies mem_mb by the attempt number)"
    """
    rule = rule or "<rule>"
    figure = "<MB>" if suggest_mb is None else int(suggest_mb)
    return (
        f"give it more in the profile's config.yaml (set-resources: {{{rule}: {{mem_mb: {figure}}}}}) "
        "or rerun with --retries 1 (each retry multiplies mem_mb by the attempt number)"
    )


def out_of_memory_message(info, error):
    """One line for a job that ran out of memory: rule, its ``mem_mb``, what failed, what to raise.

    Parameters
    ----------
    info : JobInfo
        The job; twice its ``mem_mb`` is suggested.
    error : MemoryError
        What failed (numpy: "Unable to allocate ...").

    Returns
    -------
    str

    Examples
    --------
    >>> out_of_memory_message(JobInfo("x.log", "objects", 2000), MemoryError("Unable to allocate 3 GiB"))
    "rule objects ran out of memory with mem_mb=2000 (Unable to allocate 3 GiB); give it more in the profile's config.yaml (set-resources: {objects: {mem_mb: 4000}}) or rerun with --retries 1 (each retry multiplies mem_mb by the attempt number)"
    """
    who = f"rule {info.rule}" if info.rule else "the job"
    given = f"mem_mb={info.mem_mb}" if info.mem_mb is not None else "its mem_mb"
    what = " ".join(str(error).split()) or type(error).__name__
    suggest = None if info.mem_mb is None else 2 * info.mem_mb
    return f"{who} ran out of memory with {given} ({what}); {more_memory_hint(info.rule, suggest_mb=suggest)}"


def keep_freed_memory():
    """Let this process keep the memory it frees for its next arrays, up to 1 GiB.

    Prediction and training allocate and free arrays of megabytes for every section and node.
    By default glibc's allocator hands freed memory at the top of its heap back to the system,
    and every new array there pays its page faults again; keeping it made prediction about 10 %
    faster (``benchmarks/peer_speed.py``). The peak memory is the same; the process simply does
    not shrink before it ends, which a job does not need. Returns whether the allocator took
    the setting (False where the C library is not glibc).
    """
    try:
        mallopt = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").mallopt
    except (OSError, AttributeError):
        return False
    # setting either fixes both (glibc stops adjusting them itself): the mmap threshold is set
    # to the top of its own range, so large arrays still come from and go back to the system
    return bool(mallopt(_M_MMAP_THRESHOLD, _MMAP_THRESHOLD)) and bool(
        mallopt(_M_TRIM_THRESHOLD, _TRIM_THRESHOLD)
    )
