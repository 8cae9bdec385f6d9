"""Batches of fits: a resumable queue, automatic remedies, local or Dask runners.

Nothing here does statistics: each attempt is one ``hierwork fit`` child
process, judged by its exit code and run folder. See docs/batch.md.
"""
from hierwork.batch.remedies import DEFAULT_POLICY, parse_policy
from hierwork.batch.runner import run_batch
from hierwork.batch.variants import expand_variants, parse_variants

__all__ = ["DEFAULT_POLICY", "expand_variants", "parse_policy", "parse_variants", "run_batch"]
