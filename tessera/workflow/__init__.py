"""The workflow floor: files, paths, config, provenance and the job functions rules call.

Library modules of :mod:`tessera` never import from here."""
