"""Annotation tiles as arrays and tables: registry checks, sampling, split, painted masks.

Kept empty on purpose: every submodule's importers hash this file into their rerun code.
"""
