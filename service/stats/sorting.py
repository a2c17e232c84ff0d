"""Sorting a float column: the sort order and the sorted values from one sort of 64-bit keys.

``numpy.sort`` of float64 uses the machine's vector instructions; ``numpy.argsort`` of the same
column does not everywhere and can cost several times as much. :func:`order_and_sorted` gets
the order from one ``numpy.sort`` of unsigned 64-bit keys that carry each value's order-
preserving bit pattern in their high bits and the row index in their low bits [1], [2]; it
then checks the result and falls back to ``numpy.argsort`` when the check fails, so the answer
is always a correct ascending order.

References
----------
1. Knuth, D. E. (1998). The Art of Computer Programming, Vol. 3: Sorting and Searching, 2nd ed.
   Addison-Wesley. Section 5.2 (sorting records by keys that carry their own satellite data).
2. IEEE 754-2008, Standard for Floating-Point Arithmetic, section 3.4: the bit patterns of
   finite non-negative binary64 numbers are ordered as the numbers are; flipping the sign bit
   of non-negative numbers and every bit of negative ones gives unsigned integers ordered as
   the numbers are (the usual radix-sort key of floating-point numbers).
"""

from __future__ import annotations

import numpy as np

#: Below this many values ``numpy.argsort`` is cheap enough.
MIN_ROWS = 1 << 14
_SIGN = np.uint64(1 << 63)


def order_and_sorted(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Ascending sort order of *values* and the sorted values.

    Parameters
    ----------
    values : ndarray of float64, 1-D
        The column. NaN is allowed (it sorts last, as in ``numpy.argsort``).

    Returns
    -------
    order : ndarray of intp
        ``values[order]`` is ascending; equal values may come in any order (as with
        ``numpy.argsort``'s default kind).
    sorted_values : ndarray of float64
        ``values[order]``: the same array ``numpy.sort(values)`` returns.

    Notes
    -----
    For n values, the low ``b = bit_length(n - 1)`` bits of each key hold the row index and
    the high ``64 - b`` bits the top of the value's order-preserving pattern [2]. Sorting the
    keys sorts the rows by value, except that values agreeing in their top ``64 - b`` bits (a
    relative difference below about ``2**(b - 52)``: about 2e-10 for a million rows) come by
    row index; those few runs are then ordered by value with a small ``numpy.lexsort``. The
    sorted values are checked to be non-decreasing (NaN fails the check: then the order is
    recomputed with ``numpy.argsort``). The result is a true ascending order, so every
    statistic computed from it is the same as from ``numpy.argsort``.

    Examples
    --------
    >>> import numpy as np
    >>> order, ordered = order_and_sorted(np.array([0.3, -1.0, 0.3, 2.0]))
    >>> ordered.tolist()
    [-1.0, 0.3, 0.3, 2.0]
    """
    values = np.asarray(values)
    n = values.size
    if values.ndim != 1 or values.dtype != np.float64 or n < MIN_ROWS or n >= 1 << 40:
        order = np.argsort(values)
        return order, values[order]
    bits = int(n - 1).bit_length()
    low = np.uint64((1 << bits) - 1)
    raw = np.ascontiguousarray(values).view(np.uint64)
    if bool(np.all(raw < _SIGN)):
        # No sign bit set: the patterns of non-negative numbers are ordered as they are [2].
        keys = raw & ~low
    else:
        # Order-preserving pattern [2]: negative numbers flip every bit, others the sign bit.
        keys = np.where(raw >= _SIGN, ~raw, raw | _SIGN)
        keys &= ~low
    keys |= np.arange(n, dtype=np.uint64)
    keys.sort()
    # Rows whose keys agree in the high bits sit together but by row index: order each such
    # run by value (there are few: values closer than the kept precision).
    together = np.flatnonzero(np.bitwise_xor(keys[1:], keys[:-1]) <= low)
    members = np.union1d(together, together + 1) if together.size else together
    runs = keys[members] >> np.uint64(bits)
    keys &= low
    order = keys.view(np.int64).astype(np.intp, copy=False)
    if members.size:
        rows = order[members]
        order[members] = rows[np.lexsort((values[rows], runs))]
    ordered = values[order]
    if not bool(np.all(ordered[1:] >= ordered[:-1])):  # NaN: leave it to numpy
        order = np.argsort(values)
        ordered = values[order]
    return order, ordered
