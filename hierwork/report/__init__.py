"""REPORT: the shareable files of a run folder, and the comparison of two runs (no statistics inside).

``publish`` (``write_report``, ``render_report``: report.html and summary.md),
``html``, ``markdown`` and ``figures`` (the pages and their pictures),
``verdict`` (the gate's decision in words), ``markup`` (HTML escaped by
default) and ``compare`` (``hierwork compare``).
"""
