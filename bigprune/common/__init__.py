"""Shared by every stage: the store and its schema, array files, the memory budget, threads and progress, errors, fingerprints, id files."""
