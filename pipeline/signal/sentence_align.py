"""From a warping path to sentence spans in the recording, and boundaries snapped to pauses.

Works on frame indices only: ``pipeline.signal.dtw`` gives each recording frame a
synthetic frame; here each sentence's synthetic columns are looked up in that path to
find where the sentence lies in the recording, how well it matched, and where the
pause before it is. A boundary is then moved to the centre of the pause the
voice-activity step found nearest to it, within a tolerance, so that cuts fall in
silence rather than wherever the warping put them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.core.errors import ParameterError

__all__ = ["SentenceSpan", "nearest_pause", "sentence_spans"]


@dataclass(frozen=True)
class SentenceSpan:
    """Where one sentence lies in the recording, in feature frames ``[start, stop)``.

    ``start == stop`` when the path skipped the sentence (it is not in the recording).
    ``cost`` is the mean local cost of its frames, ``ratio`` its recording length over
    its synthetic length.
    """

    start: int
    stop: int
    cost: float
    ratio: float

    @property
    def found(self) -> bool:
        return self.stop > self.start


def sentence_spans(columns: np.ndarray, costs: np.ndarray, runs: np.ndarray) -> list[SentenceSpan]:
    """Each sentence's span, from the path's column per frame and the sentences' column runs.

    Parameters
    ----------
    columns : np.ndarray
        Synthetic column of each recording frame (non-decreasing).
    costs : np.ndarray
        Local cost of each recording frame's pair.
    runs : np.ndarray
        Shape (sentences, 2): each sentence's first and stop synthetic column.

    Returns
    -------
    list of SentenceSpan

    Examples
    --------
    >>> spans = sentence_spans(np.array([0, 1, 1, 2, 3, 6, 6]), np.ones(7), np.array([[1, 3], [4, 6]]))
    >>> [(s.start, s.stop, s.ratio) for s in spans]
    [(1, 4, 1.5), (5, 5, 0.0)]
    """
    columns = np.asarray(columns)
    if np.any(np.diff(columns) < 0):
        raise ParameterError("columns must be non-decreasing (a warping path)")
    out = []
    for first, stop in np.asarray(runs, dtype=np.int64).reshape(-1, 2):
        a = int(np.searchsorted(columns, first, side="left"))
        b = int(np.searchsorted(columns, stop, side="left"))
        cost = float(np.mean(costs[a:b])) if b > a else float("inf")
        out.append(SentenceSpan(a, b, cost, (b - a) / max(1, int(stop - first))))
    return out


def nearest_pause(at: float, pauses: np.ndarray, *, tolerance: float) -> int | None:
    """Index of the pause nearest to ``at`` within ``tolerance``, or None.

    Parameters
    ----------
    at : float
        A boundary, in any unit.
    pauses : np.ndarray
        Shape (pauses, 2): each pause's start and end, in the same unit, sorted.
    tolerance : float
        Largest distance from ``at`` to a pause (0 when ``at`` lies inside it).

    Returns
    -------
    int or None
        The pause holding ``at``, else the nearest one within the tolerance (ties go to the
        pause whose centre is nearer).

    Examples
    --------
    >>> pauses = np.array([[1.0, 1.4], [2.0, 3.0]])
    >>> nearest_pause(1.6, pauses, tolerance=0.3), nearest_pause(1.7, pauses, tolerance=0.2)
    (0, None)
    >>> nearest_pause(2.1, pauses, tolerance=1.0)
    1
    """
    if tolerance < 0:
        raise ParameterError(f"tolerance={tolerance} must be >= 0")
    pauses = np.asarray(pauses, dtype=np.float64).reshape(-1, 2)
    if not len(pauses):
        return None
    gap = np.maximum(0.0, np.maximum(pauses[:, 0] - at, at - pauses[:, 1]))
    near = np.flatnonzero(gap <= tolerance)
    if not near.size:
        return None
    centres = np.abs(pauses[near].mean(axis=1) - at)
    return int(near[np.lexsort((centres, gap[near]))[0]])
