"""NUNIQ pixel arithmetic (IVOA MOC standard), vectorized and pure.

A multi-order pixel at order ``k`` with NESTED index ``i`` has the unique id
``uniq = 4 * 4**k + i`` (IVOA MOC 1.1, section 2.3.1). At a finer order
``K >= k`` it covers the NESTED range ``[i * 4**(K-k), (i+1) * 4**(K-k))``.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "MAX_ORDER",
    "uniq_to_order_ipix",
    "order_ipix_to_uniq",
    "pixel_area_sr",
    "nested_ranges",
    "order_of_nside",
]

#: Deepest order whose NESTED indices fit healpy's int64 arithmetic.
MAX_ORDER = 29


def order_of_nside(nside: int) -> int:
    """Order ``k`` with ``nside = 2**k``; raises ``ValueError`` if not a power of two."""
    nside = int(nside)
    if nside < 1 or nside & (nside - 1):
        raise ValueError(f"NSIDE={nside} is not a positive power of two")
    order = nside.bit_length() - 1
    if order > MAX_ORDER:
        raise ValueError(f"NSIDE={nside} (order {order}) exceeds the deepest order {MAX_ORDER}")
    return order


def uniq_to_order_ipix(uniq):
    """Split NUNIQ ids into (order, NESTED ipix), both int64 arrays.

    Raises ``ValueError`` for ids below 4 or deeper than :data:`MAX_ORDER`.
    """
    uniq = np.asarray(uniq, dtype=np.int64)
    if uniq.size and uniq.min() < 4:
        raise ValueError(f"NUNIQ id {int(uniq.min())} is below 4 (no HEALPix order encodes it)")
    # order = floor(log2(uniq / 4) / 2); exact in integers via bit length.
    bits = _bit_length(uniq)
    order = (bits - 3) // 2
    if uniq.size and order.max() > MAX_ORDER:
        raise ValueError(f"NUNIQ id {int(uniq.max())} encodes order {int(order.max())} > {MAX_ORDER}")
    ipix = uniq - (np.int64(4) << (2 * order))
    return order, ipix


def order_ipix_to_uniq(order, ipix):
    """NUNIQ ids from (order, NESTED ipix)."""
    order = np.asarray(order, dtype=np.int64)
    ipix = np.asarray(ipix, dtype=np.int64)
    return (np.int64(4) << (2 * order)) + ipix


def pixel_area_sr(order):
    """Area of a pixel at ``order`` in steradians: ``4π / (12 · 4**order)``."""
    order = np.asarray(order, dtype=np.float64)
    return 4.0 * np.pi / (12.0 * 4.0**order)


def nested_ranges(uniq, at_order: int):
    """NESTED index ranges ``[start, end)`` at ``at_order`` covered by each pixel."""
    order, ipix = uniq_to_order_ipix(uniq)
    if order.size and order.max() > at_order:
        raise ValueError(f"pixel of order {int(order.max())} is finer than order {at_order}")
    shift = 2 * (at_order - order)
    start = ipix << shift
    end = (ipix + 1) << shift
    return start, end


def _bit_length(values: np.ndarray) -> np.ndarray:
    """Bit length of positive int64 values (exact, no float rounding)."""
    out = np.zeros(values.shape, dtype=np.int64)
    v = values.copy()
    for step in (32, 16, 8, 4, 2, 1):
        big = v >= (np.int64(1) << step)
        out[big] += step
        v[big] >>= step
    out += (v > 0).astype(np.int64)
    return out
