"""Per-section quality control of a serial EM stack.

Sections of a volume EM stack get lost, torn, blurred, charged, drift in intensity and shift.
:mod:`~tessera.section_qc.metrics` measures every section on its own (brightness, contrast,
sharpness, blank area and, with :mod:`~tessera.section_qc.shift`, the translation from the
previous section); :mod:`~tessera.section_qc.flags` flags sections that depart from the
local trend of their neighbours;
:mod:`~tessera.section_qc.plot` draws a summary. Import the submodules directly: this file
imports nothing, so a job runs (and its code version hashes) only the parts it uses.
"""
