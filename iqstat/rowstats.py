"""Row-wise statistics of 2-D arrays shared by the batched stage cores (pure numpy)."""

from __future__ import annotations

import numpy as np


def median_rows(v: np.ndarray) -> np.ndarray:
    """np.median(v, axis=1) of finite rows, with one partition (two kth values cost ~7×).

    The median of an even row is the mean of its two middle values: the largest of the lower
    half after partitioning at n/2, and the n/2-th.
    """
    n = v.shape[1]
    k = n // 2
    part = np.partition(v, k, axis=1)
    if n % 2:
        return part[:, k]
    return (part[:, :k].max(axis=1) + part[:, k]) / 2
