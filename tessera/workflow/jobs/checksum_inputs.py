"""The checksum_inputs rule: SHA-256 of one dataset's input files, an audit record.

A module of its own (not beside the methods job) so that editing the methods text never
reruns these jobs, which read every input stack in full.
"""

from tessera.io.digests import file_sha256
from tessera.workflow.files.input_checksums import write_input_checksums


def checksum_inputs_job(paths, out_path):
    """Write ``<sha256>  <path>`` lines for the input files of one dataset (an audit record)."""
    write_input_checksums(out_path, [(file_sha256(p), p) for p in paths])
    return {"files": len(paths)}
