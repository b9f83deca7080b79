"""pipeline.core.columns against pyarrow's own compute functions."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from pipeline.core.columns import distinct_count


def test_distinct_counts_as_count_distinct():
    import pyarrow.compute as pc

    # Reference: pyarrow's count_distinct (nulls not counted), on chunks with and
    # without nulls, and empty.
    rng = np.random.default_rng(3)
    for n in (0, 1, 50, 400):
        values = [None if rng.random() < 0.1 else f"s{rng.integers(40)}" for _ in range(n)]
        for column in (pa.array(values, pa.string()), pa.chunked_array([values[: n // 2], values[n // 2:]], pa.string()),
                       pa.array([v for v in values if v is not None], pa.string())):
            assert distinct_count(column) == pc.count_distinct(column).as_py()
