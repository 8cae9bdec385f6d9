"""DATA: the data file read and checked against the spec, before any sampling.

``reading`` (file -> :class:`~hierwork.data.reading.Dataset`), ``rows`` (row
checks and messages, shared with ``predict``) and ``labels`` (the group label
rules, shared with ``predict``).
"""
