"""Progress lines for logs (:class:`hierwork.inference.sampling.ProgressLog`), on a fake clock."""
from __future__ import annotations

import io
from types import SimpleNamespace

from hierwork.inference.sampling import ProgressLog


class Clock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_a_line_per_chain_at_intervals_and_at_the_end():
    clock, out = Clock(), io.StringIO()
    log = ProgressLog(2, warmup=10, draws=10, stream=out, every=30.0, clock=clock)
    for it in range(1, 21):
        clock.now = 4.0 * it  # 4 s per iteration: due at 32 s, 64 s, and at the last iteration (80 s)
        for chain in range(2):
            log.pymc_callback(None, SimpleNamespace(chain=chain, draw_idx=it - 1, stats=[{"diverging": it in (5, 12)}]))
    lines = out.getvalue().splitlines()
    assert lines[0] == "chain 1/2: iteration 8/20 (warm-up), 0:32 elapsed, 0 divergences after warm-up"
    assert lines[-1] == "chain 2/2: iteration 20/20 (sampling), 1:20 elapsed, 1 divergences after warm-up"
    assert len(lines) == 6  # 2 chains x (32 s, 64 s, end)
