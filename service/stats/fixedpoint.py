"""Fixed-point running sums: exact integers whatever the order of addition.

The scorer keeps its running sums (level posterior, CUSUM, runs) in 2**-24 fixed point in int64,
so scoring a timeline in one call or in consecutive chunks gives bit-identical results.
"""

from __future__ import annotations

import numpy as np

__all__ = ["FIX_CLIP", "FIX_SCALE", "segment_sums", "to_fixed"]

FIX_SCALE = float(1 << 24)  # fixed-point scale of the running sums (resolution 6e-8)
FIX_CLIP = 1e7  # no single term beyond this magnitude (keeps int64 sums far from overflow)


def to_fixed(x: np.ndarray) -> np.ndarray:
    """``x`` in units of 2**-24 as int64, each value clipped to +-:data:`FIX_CLIP` first."""
    # np.minimum/np.maximum: the same as np.clip here, without its Python-level wrapper
    return np.rint(np.minimum(np.maximum(x, -FIX_CLIP), FIX_CLIP) * FIX_SCALE).astype(np.int64)


def segment_sums(values: np.ndarray, starts_run: np.ndarray, base: object) -> np.ndarray:
    """Running int64 sums that restart where ``starts_run``; the first segment adds ``base``.

    ``values`` may have leading axes (rows summed along the last axis, all restarting at the
    same ``starts_run``), with ``base`` one value per row. Exact in two's-complement
    arithmetic even if the global cumulative sum wraps.
    """
    values = np.asarray(values)
    n = values.shape[-1]
    cs0 = np.zeros(values.shape[:-1] + (n + 1,), dtype=np.result_type(values, np.int64))
    np.cumsum(values, axis=-1, out=cs0[..., 1:])  # cs0[..., k]: sum of the first k values
    cs = cs0[..., 1:]
    b = np.asarray(base, dtype=np.int64)[..., None]
    if not starts_run.any():
        return cs + b
    # index of the latest run start at or before each position (-1: none yet)
    last = np.maximum.accumulate(np.where(starts_run, np.arange(n), -1))
    # integer arrays wrap silently (two's complement); the difference is exact regardless
    return np.where(last >= 0, cs - cs0[..., last], cs + b)
