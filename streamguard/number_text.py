"""JSON number texts to float64 in a compiled kernel, correctly rounded (round half to even), so that the
live decoder can convert the number spans found by ``payload_scan`` without importing pyarrow.

Each span is read as ``w * 10**q`` with at most 19 significant decimal digits in the uint64 ``w``; then:

- Clinger's fast path when ``w <= 2**53`` and ``-22 <= q <= 22``: both ``w`` and ``10**|q|`` are exact
  doubles, so one IEEE multiplication or division rounds the exact value once, correctly.
- Otherwise the Eisel–Lemire algorithm (D. Lemire, "Number Parsing at a Gigabyte per Second", Software:
  Practice and Experience 51(8), 2021; N. Mushtak and D. Lemire, "Fast number parsing without fallback",
  Software: Practice and Experience 53(6), 2023): ``w`` times a 128-bit truncated power of five, rounded
  by hand, with subnormals, overflow to inf, underflow to zero and the round-half-to-even case.
- When more than 19 significant digits were present (and a dropped one is not zero), the value lies
  strictly between ``w`` and ``w + 1`` times ``10**q``: if both round to the same double, that is the
  answer; otherwise the span is marked, as it is when the algorithm cannot decide, and the wrapper
  converts it with Python's ``float`` (correctly rounded, D. Gay's algorithm). That is rare (about 2 in
  1000 of long random digit strings, never for 17-digit ``repr`` texts in tests/test_number_text.py).

Digits beyond the double range give inf (``1e400``), as ``float('1e400')`` does; the decoder hands inf to
its general path. The kernel also checks the JSON grammar (RFC 8259, section 6) itself, so the wrapper
accepts any spans and answers None when one is not a JSON number.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# Range of the powers-of-five table: w * 10**q with w < 2**64 is below half the smallest subnormal for
# q < -342 and above the largest double for q > 308 (w >= 1).
_SMALLEST_POWER = -342
_LARGEST_POWER = 308


def _power_of_five_table() -> tuple[np.ndarray, np.ndarray]:
    """High and low 64-bit words of 5**q for q in [-342, 308], normalised so bit 127 is set.

    For q >= 0 the leading 128 bits of 5**q (truncated). For q < 0 the reciprocal 2**b / 5**-q plus one,
    truncated to 128 bits, with b = ceil(log2 5**-q) + 127 when q >= -27 (where it fits in 128 bits as is)
    and b = 2 * ceil(log2 5**-q) + 128 otherwise: the table the Eisel–Lemire error bounds are proved for
    (Lemire 2021, section 5; Mushtak & Lemire 2023). Exact integers, computed once at import.
    """
    count = _LARGEST_POWER - _SMALLEST_POWER + 1
    high = np.empty(count, dtype=np.uint64)
    low = np.empty(count, dtype=np.uint64)
    mask = (1 << 64) - 1
    for q in range(_SMALLEST_POWER, _LARGEST_POWER + 1):
        if q >= 0:
            value = 5**q
            bits = value.bit_length()
            value = value << (128 - bits) if bits <= 128 else value >> (bits - 128)
        else:
            power5 = 5**-q
            z = power5.bit_length()  # ceil(log2(5**k)): 5**k is never a power of two for k >= 1
            b = z + 127 if q >= -27 else 2 * z + 128
            value = (1 << b) // power5 + 1
            if value.bit_length() > 128:
                value >>= value.bit_length() - 128
        high[q - _SMALLEST_POWER] = value >> 64
        low[q - _SMALLEST_POWER] = value & mask
    return high, low


POWER5_HIGH, POWER5_LOW = _power_of_five_table()
# 10**0 .. 10**22, each an exact double (5**22 < 2**53).
_EXACT_POWERS_OF_TEN = np.array([10.0**k for k in range(23)], dtype=np.float64)

_U0 = np.uint64(0)
_U1 = np.uint64(1)
_U3 = np.uint64(3)
_U10 = np.uint64(10)
_U32 = np.uint64(32)
_U52 = np.uint64(52)
_U63 = np.uint64(63)
_LOW32 = np.uint64(0xFFFFFFFF)
_ALL_ONES = np.uint64(0xFFFFFFFFFFFFFFFF)
_PRECISION_MASK = np.uint64(0x1FF)  # 64 - (52 + 3) low bits of the high word: 52 explicit bits, implicit, round
_HIDDEN_BIT = np.uint64(1 << 52)
_TWO_HIDDEN = np.uint64(2 << 52)
_INF_BITS = np.uint64(0x7FF << 52)
_SIGN_BIT = np.uint64(1 << 63)
_TWO_POW_53 = np.uint64(1 << 53)
_MAX_DIGITS = 19  # 10**19 - 1 < 2**64
_EXPONENT_CAP = 10**17  # beyond this the value is 0 or inf whatever the digits; keeps int64 from overflowing

# Outcomes per span, returned by the kernel.
DONE, FALLBACK = 0, 1
# Kernel return values other than a count of fallback spans.
NOT_A_NUMBER, OUT_OF_BOUNDS = -1, -2


@njit(cache=True, nogil=True)
def _multiply_128(a, b):
    """(high, low) words of the 128-bit product of two uint64, from 32-bit halves (numba has no u128)."""
    a_lo = a & _LOW32
    a_hi = a >> _U32
    b_lo = b & _LOW32
    b_hi = b >> _U32
    lo_lo = a_lo * b_lo
    lo_hi = a_lo * b_hi
    hi_lo = a_hi * b_lo
    hi_hi = a_hi * b_hi
    middle = (lo_lo >> _U32) + (lo_hi & _LOW32) + (hi_lo & _LOW32)  # < 3 * 2**32: no wrap
    low = (lo_lo & _LOW32) | (middle << _U32)
    high = hi_hi + (lo_hi >> _U32) + (hi_lo >> _U32) + (middle >> _U32)
    return high, low


@njit(cache=True, nogil=True)
def _leading_zeros(x):
    """Count of leading zero bits of a non-zero uint64 (binary search: no clz intrinsic in plain numba)."""
    n = 0
    for shift in (32, 16, 8, 4, 2, 1):
        if (x >> np.uint64(64 - shift)) == _U0:
            n += shift
            x <<= np.uint64(shift)
    return n


@njit(cache=True, nogil=True)
def _eisel_lemire(w, q, power5_high, power5_low):
    """(bits of the double nearest w * 10**q without its sign, decided); undecided means: use the fallback.

    Lemire 2021, algorithm 1 with the rounding of section 8; the product of the normalised w and the
    truncated 128-bit power of five is short of the exact product by less than one unit of its low word,
    so the 52 + 3 leading bits are right unless the 9 bits below them are all ones, when the second word
    of the power refines the product.
    """
    if w == _U0 or q < _SMALLEST_POWER:
        return _U0, True
    if q > _LARGEST_POWER:
        return _INF_BITS, True
    lz = _leading_zeros(w)
    w <<= np.uint64(lz)
    index = q - _SMALLEST_POWER
    high, low = _multiply_128(w, power5_high[index])
    if (high & _PRECISION_MASK) == _PRECISION_MASK:
        second_high, _second_low = _multiply_128(w, power5_low[index])
        low += second_high
        if second_high > low:  # carry out of the low word
            high += _U1
    # The 2021 paper's only failure: the refined low word could still be short of a carry. Mushtak & Lemire
    # (2023) prove this never changes the result; kept as a safeguard, it only sends a span to the fallback.
    if low == _ALL_ONES and (q < -27 or q > 55):
        return _U0, False
    upperbit = np.int64(high >> _U63)
    shift = upperbit + 9  # 64 - (52 + 3), one more when the top bit is set
    mantissa = high >> np.uint64(shift)
    # floor(log2(10**q)) + 63 via 217706 / 2**16 ~ log2(10) (exact for |q| < 350, Lemire 2021, section 6).
    power2 = ((217706 * q) >> 16) + 63 + upperbit - lz + 1023
    if power2 <= 0:  # subnormal, or zero
        if 1 - power2 >= 64:
            return _U0, True
        mantissa >>= np.uint64(1 - power2)
        mantissa += mantissa & _U1
        mantissa >>= _U1
        # Rounding may carry into the smallest normal exponent; the OR below makes that bit the exponent.
        return mantissa, True
    # Exactly halfway between two doubles: only possible when 5**|q| fits the product exactly, q in [-4, 23].
    if low <= _U1 and -4 <= q <= 23 and (mantissa & _U3) == _U1:
        if (mantissa << np.uint64(shift)) == high:
            mantissa &= ~_U1  # round half to even: do not round up
    mantissa += mantissa & _U1
    mantissa >>= _U1
    if mantissa >= _TWO_HIDDEN:
        mantissa = _HIDDEN_BIT
        power2 += 1
    mantissa &= ~_HIDDEN_BIT
    if power2 >= 0x7FF:
        return _INF_BITS, True
    return (np.uint64(power2) << _U52) | mantissa, True


@njit(cache=True, nogil=True)
def number_spans_kernel(buffer, starts, lengths, out, outcome, power5_high, power5_low, exact_powers):
    """Convert each span buffer[starts[i]:starts[i] + lengths[i]] into out[i].

    Returns the number of spans marked FALLBACK in outcome (out[i] is then not set), NOT_A_NUMBER at the
    first span that is not a JSON number, or OUT_OF_BOUNDS for a span outside the buffer. The tables are
    arguments, not globals, so the compiled and cached kernel holds no copy of them.
    """
    bits = out.view(np.uint64)
    size = buffer.shape[0]
    pending = 0
    for i in range(starts.shape[0]):
        p = starts[i]
        end = p + lengths[i]
        if p < 0 or end > size or end < p:
            return OUT_OF_BOUNDS
        # -- grammar and digits: -?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?
        negative = False
        if p < end and buffer[p] == 45:  # '-'
            negative = True
            p += 1
        if p >= end:
            return NOT_A_NUMBER
        w = _U0
        kept = 0  # significant digits in w
        q = 0  # decimal exponent of w
        truncated = False  # a non-zero digit was dropped after the 19th
        c = buffer[p]
        if c == 48:  # a lone '0'
            p += 1
        elif 49 <= c <= 57:
            while p < end:
                c = buffer[p]
                if c < 48 or c > 57:
                    break
                if kept < _MAX_DIGITS:
                    w = w * _U10 + np.uint64(c - 48)
                    kept += 1
                else:
                    q += 1
                    if c != 48:
                        truncated = True
                p += 1
        else:
            return NOT_A_NUMBER
        if p < end and buffer[p] == 46:  # '.'
            p += 1
            if p >= end or buffer[p] < 48 or buffer[p] > 57:
                return NOT_A_NUMBER
            while p < end:
                c = buffer[p]
                if c < 48 or c > 57:
                    break
                if kept == 0 and c == 48:  # leading zeros of 0.000ddd are not significant
                    q -= 1
                elif kept < _MAX_DIGITS:
                    w = w * _U10 + np.uint64(c - 48)
                    kept += 1
                    q -= 1
                elif c != 48:
                    truncated = True
                p += 1
        if p < end and (buffer[p] == 101 or buffer[p] == 69):  # 'e' or 'E'
            p += 1
            exponent_negative = False
            if p < end and (buffer[p] == 43 or buffer[p] == 45):
                exponent_negative = buffer[p] == 45
                p += 1
            if p >= end or buffer[p] < 48 or buffer[p] > 57:
                return NOT_A_NUMBER
            exponent = 0
            while p < end:
                c = buffer[p]
                if c < 48 or c > 57:
                    break
                if exponent < _EXPONENT_CAP:
                    exponent = exponent * 10 + (c - 48)
                p += 1
            q += -exponent if exponent_negative else exponent
        if p != end:
            return NOT_A_NUMBER
        # -- value
        outcome[i] = DONE
        if not truncated and w <= _TWO_POW_53 and -22 <= q <= 22:
            value = np.float64(w)
            if q >= 0:
                value *= exact_powers[q]
            else:
                value /= exact_powers[-q]
            out[i] = -value if negative else value
            continue
        result, decided = _eisel_lemire(w, q, power5_high, power5_low)
        if decided and truncated:
            # The exact value is strictly between w and w + 1 (times 10**q); both ends must round alike.
            upper, upper_decided = _eisel_lemire(w + _U1, q, power5_high, power5_low)
            decided = upper_decided and upper == result
        if not decided:
            outcome[i] = FALLBACK
            pending += 1
            continue
        bits[i] = (result | _SIGN_BIT) if negative else result
    return pending


def parse_spans(buffer: np.ndarray, starts: np.ndarray, lengths: np.ndarray) -> np.ndarray | None:
    """float64 per span (buffer uint8, starts/lengths int64); None if any span is not a JSON number.

    Exactly what Python's ``float`` returns for each span's text (inf beyond the double range). A span
    outside the buffer is a caller's error: ValueError.
    """
    buffer = np.ascontiguousarray(buffer, dtype=np.uint8)
    starts = np.ascontiguousarray(starts, dtype=np.int64)
    lengths = np.ascontiguousarray(lengths, dtype=np.int64)
    if starts.shape != lengths.shape or starts.ndim != 1:
        raise ValueError("starts and lengths must be 1-D arrays of the same length")
    n = starts.shape[0]
    out = np.empty(n, dtype=np.float64)
    if n == 0:
        return out
    outcome = np.empty(n, dtype=np.uint8)
    pending = number_spans_kernel(buffer, starts, lengths, out, outcome, POWER5_HIGH, POWER5_LOW,
                                  _EXACT_POWERS_OF_TEN)  # fmt: skip
    if pending == NOT_A_NUMBER:
        return None
    if pending == OUT_OF_BOUNDS:
        raise ValueError("a span lies outside the buffer")
    if pending:
        for i in np.flatnonzero(outcome == FALLBACK).tolist():
            s = int(starts[i])
            out[i] = float(buffer[s : s + int(lengths[i])].tobytes())
    return out
