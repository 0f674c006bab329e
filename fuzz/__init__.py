"""Fuzzing of rawproof's readers: real seed files, mutations, and the one rule checked.

The rule (issue 9, "hostile files"): every reader either returns Volumes whose
frames can be read, or raises :class:`app.errors.InputError`, within a time and
memory bound. :mod:`fuzz.seeds` builds the seed files, :mod:`fuzz.mutate` the
mutations, :mod:`fuzz.harness` checks one input. ``tests/test_fuzz_readers.py``
runs a bounded hypothesis search over them; ``fuzz/run.py`` runs a longer one.
"""
