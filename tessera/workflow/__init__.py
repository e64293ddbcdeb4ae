"""The workflow floor: files, paths, config, provenance and the job functions rules call.

Library modules of :mod:`tessera` never import from here. Importing this package registers the
workflow's wording for damaged stores with the io layer (see :mod:`tessera.workflow.paths`), so
every job and every test of workflow code names the rule that rebuilds a store."""

import tessera.workflow.paths  # noqa: F401 - registers the rebuild hints of the results grammar
