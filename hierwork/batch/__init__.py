"""BATCH: many fits overnight; a resumable queue, automatic remedies, local or Dask runners.

Nothing here does statistics: each attempt is one ``hierwork fit`` child
process, judged by its exit code and run folder. See docs/batch.md. The entry
point is :func:`hierwork.batch.runner.run_batch`; the spec keys a batch reads
(``variants``, ``remedies``) are parsed in :mod:`hierwork.declare`.
"""
