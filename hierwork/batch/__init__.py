"""Batches of fits: a resumable queue, automatic remedies, local or Dask runners.

Nothing here does statistics: each attempt is one ``hierwork fit`` child
process, judged by its exit code and run folder. See docs/batch.md. The entry
point is :func:`hierwork.batch.runner.run_batch`; this package's top level
holds only what the spec loader needs, so importing it stays light.
"""
from hierwork.batch.remedies import DEFAULT_POLICY, parse_policy
from hierwork.batch.variants import expand_variants, parse_variants

__all__ = ["DEFAULT_POLICY", "expand_variants", "parse_policy", "parse_variants"]
