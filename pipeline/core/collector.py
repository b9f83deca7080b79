"""How often the ``loam`` process runs Python's cyclic garbage collector.

Its own module, imported by the command line alone: ``core/startup.py`` is reached by
every stage's code (through ``core/manifest.py``), so an edit there changes every
stage's code version and every per-file cache's scope, and the next build probes and
conditions all its audio again.
"""

from __future__ import annotations

import gc

# The collector's thresholds (young, middle, old generation). Python's default,
# (700, 10, 10), collects the young generation after every 700 new container objects:
# a rebuild of the 100,000-source bench workload (1 % new files) ran 211 collections in
# its driver, 0.062 to 0.065 s (timed by gc.callbacks, 2 runs); with these, 20
# collections and 0.029 to 0.033 s. (10,000, 10, 10) ran two middle-generation
# collections as well, 0.062 to 0.078 s. Loam's bulk data lives in numpy and Arrow
# buffers, which the collector never walks; its Python rows and records are freed by
# reference counting, so collecting less often only lets a few thousand more objects
# wait. No output depends on it.
COLLECTOR_THRESHOLDS = (10_000, 50, 100)


def collect_less_often() -> None:
    """Raise the cyclic collector's thresholds to ``COLLECTOR_THRESHOLDS`` (none is
    lowered). Worker processes forked afterwards inherit them.

    Examples
    --------
    >>> before = gc.get_threshold()
    >>> collect_less_often()
    >>> all(now >= wanted for now, wanted in zip(gc.get_threshold(), COLLECTOR_THRESHOLDS, strict=True))
    True
    >>> gc.set_threshold(*before)
    """
    gc.set_threshold(*(max(now, wanted) for now, wanted in zip(gc.get_threshold(), COLLECTOR_THRESHOLDS,
                                                                strict=True)))
