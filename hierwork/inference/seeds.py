"""Independent random streams under the spec's one seed.

The sampler takes ``sampling.seed`` itself. Everything else random draws from
a stream of its own, ``numpy.random.default_rng([seed, STREAM])``, so that each
result is reproducible and independent of the others: the same seed gives the
same numbers whatever else a run computes.
"""
from __future__ import annotations

import numpy as np

#: What draws from which stream (the second word of the seed sequence). Never renumber: saved runs
#: are reproduced from these.
STREAMS = {
    "group_effects": 5,          # exact draws of integrated-out group effects (collapsed path)
    "effect_refresh": 6,         # Metropolis-Hastings refresh of sampled group effects (non-normal outcomes)
    "pooling_baselines": 7,      # seeds of the complete- and no-pooling fits compared by LOO
    "posterior_predictive": 101,
    "prior_predictive": 102,
    "predict": 103,
    "poststratify": 171,         # effects of population cells in groups the fit never saw
}


def rng(seed: int, stream: str) -> np.random.Generator:
    """The generator of one named stream under ``seed``."""
    return np.random.default_rng([int(seed), STREAMS[stream]])


def child_seeds(seed: int, stream: str, count: int) -> list[int]:
    """``count`` seeds for further samplers, derived from one stream."""
    return [int(s) for s in np.random.SeedSequence([int(seed), STREAMS[stream]]).generate_state(count)]
