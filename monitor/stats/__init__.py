"""Statistics core: vectorised numpy/scipy functions with no I/O.

May import numpy and SciPy only (and the standard library): never SQLAlchemy, Jinja2, pandas
or another part of ``monitor``, so the statistics can be used and tested on their own. Bad
arguments raise :class:`StatsError`, a ``ValueError``.
"""


class StatsError(ValueError):
    """Arguments a statistic cannot use (shapes that disagree, negative counts, NaN)."""


__all__ = ["StatsError"]
