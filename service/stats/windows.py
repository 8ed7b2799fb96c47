"""Window sums of short-interval counts (20 or 30 s) for fitting and scoring.

Pure numpy. A freeway lane sees a few vehicles per 20 s interval, and none in most intervals
at night: single intervals carry too little information to judge, and a run of zeros or of one
repeated value is ordinary there. Such detectors are fitted and scored on their counts summed
to windows (``service.domain.SHORT_INTERVAL_WINDOW_S``), where the expected count is large
enough for the tests. A sum of independent Poisson counts is Poisson with the summed mean, so
the baseline and the tests apply to the sums unchanged.

A window counts as reported only when every interval in it arrived: a partial sum would read as
a drop in volume. Windows are aligned to UTC multiples of ``window_s``, which equals the local
grid whenever the zone's UTC offset is a multiple of ``window_s`` (every offset in use today is
a multiple of 15 minutes, so of a 300 s window).
"""

from __future__ import annotations

import numpy as np

__all__ = ["complete_window_end", "window_sums"]


def window_sums(start_s: np.ndarray, counts: np.ndarray, *, interval_s: int, window_s: int
                ) -> tuple[np.ndarray, np.ndarray]:
    """Counts summed per window, complete windows only.

    Parameters
    ----------
    start_s : numpy.ndarray of int
        Interval starts, epoch seconds (UTC), each on the ``interval_s`` grid, no duplicates.
    counts : numpy.ndarray of int
        Vehicles per interval.
    interval_s, window_s : int
        Interval and window lengths, seconds; ``interval_s`` divides ``window_s``.

    Returns
    -------
    window_start_s, sums : numpy.ndarray of int64
        Start (epoch seconds) and vehicles of each window in which all
        ``window_s // interval_s`` intervals are present, in time order.
    """
    if window_s % interval_s:
        raise ValueError(f"interval_s {interval_s} must divide window_s {window_s}")
    start_s = np.asarray(start_s, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.int64)
    if start_s.size == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    window = start_s - start_s % window_s
    order = np.argsort(window, kind="stable")
    window, counts = window[order], counts[order]
    starts, first, n = np.unique(window, return_index=True, return_counts=True)
    sums = np.add.reduceat(counts, first)
    full = n == window_s // interval_s
    return starts[full], sums[full].astype(np.int64)


def complete_window_end(latest_start_s: int, *, interval_s: int, window_s: int) -> int:
    """End (epoch s) of the last window that ends by the end of the interval starting at
    ``latest_start_s``: windows after it cannot be complete yet."""
    end = latest_start_s + interval_s
    return end - end % window_s
