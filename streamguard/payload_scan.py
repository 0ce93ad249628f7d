"""Compiled scanners for the payload shapes nearly every gateway sends: flat JSON sample objects (one, or a
list of them) with an ISO 8601 or epoch timestamp and a numeric value.

Used by ``decode.py`` on a whole micro-batch at once. They decide only what they can read without doubt
and hand everything else back, whole messages at a time, to the decoder's general path (``json.loads``
and Python checks), which names the reason for any refusal. So these scanners change the speed of
decoding, never its result: a message they accept gives exactly the samples the general path gives
(tests/test_decode.py compares the two on generated payloads).

What the JSON scanner accepts: ASCII only; a top-level object or a non-empty list of objects; inside an
object, string keys without escapes and values that are strings without escapes, JSON numbers, true,
false or null; the timestamp a string or a number, the value a number, the quality a string (``good``,
``uncertain``, ``bad``, when the encoding reads words), true, false or null; other keys with such values
are ignored, as the general path ignores them. Anything else (nesting, escapes, NaN, the samples key of
a holder object, trailing data) goes to the general path.

Numbers are not converted here: their text spans go to pyarrow's string-to-double cast, which rounds
correctly as Python's ``float`` does. Timestamps: the strict ISO parser below, else the general path.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# Kinds of a scanned JSON value.
STRING, NUMBER, TRUE, FALSE, NULL = 1, 2, 3, 4, 5
# Rows of the key table passed to the scanner.
KEY_TIMESTAMP, KEY_VALUE, KEY_QUALITY, KEY_SAMPLES = 0, 1, 2, 3
_GOOD, _UNCERTAIN, _BAD = 0, 1, 2


# ---------------------------------------------------------------------------------------------------
# ISO 8601 timestamps: the canonical forms (valid calendar date and clock time, optional fraction of up to
# 9 digits, Z or +HH:MM / +HHMM / +HH, or no offset: UTC); anything else is left undecided.


@njit(cache=True, nogil=True)
def _digits(buffer, start, count):
    value = 0
    for k in range(start, start + count):
        d = buffer[k] - 48
        if d < 0 or d > 9:
            return -1
        value = value * 10 + d
    return value


@njit(cache=True, nogil=True)
def _days_from_civil(y, m, d):
    # Days since 1970-01-01 of a proleptic Gregorian date (H. Hinnant, "chrono-compatible low-level date
    # algorithms", days_from_civil).
    y -= m <= 2
    era = (y if y >= 0 else y - 399) // 400
    yoe = y - era * 400
    doy = (153 * (m + (-3 if m > 2 else 9)) + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


@njit(cache=True, nogil=True)
def strict_iso_kernel(buffer, starts, lengths, out, done):
    month_days = (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)
    for i in range(starts.shape[0]):
        done[i] = False
        p = starts[i]
        n = lengths[i]
        if n < 19 or buffer[p + 4] != 45 or buffer[p + 7] != 45 or buffer[p + 13] != 58 or buffer[p + 16] != 58:
            continue
        if buffer[p + 10] != 84 and buffer[p + 10] != 32:  # 'T' or ' '
            continue
        year = _digits(buffer, p, 4)
        month = _digits(buffer, p + 5, 2)
        day = _digits(buffer, p + 8, 2)
        hour = _digits(buffer, p + 11, 2)
        minute = _digits(buffer, p + 14, 2)
        second = _digits(buffer, p + 17, 2)
        if year < 1678 or year > 2261 or month < 1 or month > 12 or day < 1 or hour < 0 or hour > 23:
            continue
        if minute < 0 or minute > 59 or second < 0 or second > 59:
            continue
        leap = (year % 4 == 0 and year % 100 != 0) or year % 400 == 0
        if day > month_days[month - 1] + (1 if month == 2 and leap else 0):
            continue
        q = p + 19
        end = p + n
        fraction = 0
        if q < end and buffer[q] == 46:  # '.'
            q += 1
            digits = 0
            while q < end and 48 <= buffer[q] <= 57:
                if digits == 9:
                    digits = 10
                    break
                fraction = fraction * 10 + (buffer[q] - 48)
                digits += 1
                q += 1
            if digits == 0 or digits > 9:
                continue
            for _ in range(9 - digits):
                fraction *= 10
        offset = 0
        rest = end - q
        if rest == 1 and buffer[q] == 90:  # 'Z'
            pass
        elif (rest == 3 or rest == 5 or rest == 6) and (buffer[q] == 43 or buffer[q] == 45):
            sign = 1 if buffer[q] == 43 else -1
            oh = _digits(buffer, q + 1, 2)
            om = 0
            if rest == 6:
                if buffer[q + 3] != 58:
                    continue
                om = _digits(buffer, q + 4, 2)
            elif rest == 5:
                om = _digits(buffer, q + 3, 2)
            if oh < 0 or oh > 23 or om < 0 or om > 59:
                continue
            offset = sign * (oh * 3600 + om * 60)
        elif rest != 0:
            continue
        seconds = _days_from_civil(year, month, day) * 86400 + hour * 3600 + minute * 60 + second - offset
        out[i] = seconds * 1_000_000_000 + fraction
        done[i] = True


def strict_iso_times(text: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(int64 ns, decided) for ISO texts; the undecided ones are for pyarrow."""
    n = len(text)
    out = np.zeros(n, dtype=np.int64)
    done = np.zeros(n, dtype=np.bool_)
    try:
        buffer = np.frombuffer("".join(text).encode("ascii"), dtype=np.uint8)
    except UnicodeEncodeError:
        return out, done
    lengths = np.fromiter(map(len, text), dtype=np.int64, count=n)
    starts = np.zeros(n, dtype=np.int64)
    np.cumsum(lengths[:-1], out=starts[1:])
    strict_iso_kernel(buffer, starts, lengths, out, done)
    return out, done


# ---------------------------------------------------------------------------------------------------
# JSON sample objects


@njit(cache=True, nogil=True)
def _skip_space(buf, p, end):
    while p < end:
        c = buf[p]
        if c != 32 and c != 9 and c != 10 and c != 13:
            return p
        p += 1
    return p


@njit(cache=True, nogil=True)
def _string_end(buf, p, end):
    """Index of the closing quote of the string opening at p, or -1 (escape, control or non-ASCII byte)."""
    q = p + 1
    while q < end:
        c = buf[q]
        if c == 34:
            return q
        if c == 92 or c < 32 or c >= 128:
            return -1
        q += 1
    return -1


@njit(cache=True, nogil=True)
def _number_end(buf, p, end):
    """Index just after a JSON number starting at p (RFC 8259, section 6), or -1."""
    q = p
    if q < end and buf[q] == 45:
        q += 1
    if q >= end:
        return -1
    if buf[q] == 48:
        q += 1
    elif 49 <= buf[q] <= 57:
        while q < end and 48 <= buf[q] <= 57:
            q += 1
    else:
        return -1
    if q < end and buf[q] == 46:
        q += 1
        if q >= end or not 48 <= buf[q] <= 57:
            return -1
        while q < end and 48 <= buf[q] <= 57:
            q += 1
    if q < end and (buf[q] == 101 or buf[q] == 69):
        q += 1
        if q < end and (buf[q] == 43 or buf[q] == 45):
            q += 1
        if q >= end or not 48 <= buf[q] <= 57:
            return -1
        while q < end and 48 <= buf[q] <= 57:
            q += 1
    return q


@njit(cache=True, nogil=True)
def _matches(buf, start, length, word):
    if length != word.shape[0]:
        return False
    for j in range(length):
        if buf[start + j] != word[j]:
            return False
    return True


@njit(cache=True, nogil=True)
def _key(buf, start, length, keys, key_lengths):
    for k in range(keys.shape[0]):
        if key_lengths[k] == length:
            same = True
            for j in range(length):
                if buf[start + j] != keys[k, j]:
                    same = False
                    break
            if same:
                return k
    return -1


@njit(cache=True, nogil=True)
def _object(buf, p, end, keys, key_lengths, words, words_ok, n, ts_start, ts_length, ts_kind, value_start,
            value_length, quality):  # fmt: skip
    """Scan the object opening at p into row n; returns the index after it, or -1 to hand the message back."""
    p = _skip_space(buf, p + 1, end)
    found_ts = False
    found_value = False
    code = _GOOD
    if p < end and buf[p] == 125:  # '}'
        return -1
    while True:
        if p >= end or buf[p] != 34:
            return -1
        key_end = _string_end(buf, p, end)
        if key_end < 0:
            return -1
        key = _key(buf, p + 1, key_end - p - 1, keys, key_lengths)
        p = _skip_space(buf, key_end + 1, end)
        if p >= end or buf[p] != 58:  # ':'
            return -1
        p = _skip_space(buf, p + 1, end)
        if p >= end:
            return -1
        c = buf[p]
        start = p
        if c == 34:
            close = _string_end(buf, p, end)
            if close < 0:
                return -1
            kind = STRING
            start = p + 1
            length = close - p - 1
            p = close + 1
        elif c == 45 or 48 <= c <= 57:
            after = _number_end(buf, p, end)
            if after < 0:
                return -1
            kind = NUMBER
            length = after - p
            p = after
        elif c == 116 and p + 4 <= end and buf[p + 1] == 114 and buf[p + 2] == 117 and buf[p + 3] == 101:
            kind = TRUE
            length = 4
            p += 4
        elif c == 102 and p + 5 <= end and buf[p + 1] == 97 and buf[p + 2] == 108 and buf[p + 3] == 115 and (
                buf[p + 4] == 101):  # fmt: skip
            kind = FALSE
            length = 5
            p += 5
        elif c == 110 and p + 4 <= end and buf[p + 1] == 117 and buf[p + 2] == 108 and buf[p + 3] == 108:
            kind = NULL
            length = 4
            p += 4
        else:
            return -1
        # The last occurrence of a key wins, as in a Python dict.
        if key == KEY_TIMESTAMP:
            if kind != STRING and kind != NUMBER:
                return -1
            found_ts = True
            ts_start[n] = start
            ts_length[n] = length
            ts_kind[n] = kind
        elif key == KEY_VALUE:
            if kind != NUMBER:
                return -1
            found_value = True
            value_start[n] = start
            value_length[n] = length
        elif key == KEY_QUALITY:
            if kind == TRUE or kind == NULL:
                code = _GOOD
            elif kind == FALSE:
                code = _BAD
            elif kind == STRING and words_ok:
                if _matches(buf, start, length, words[0, : words[0, 15]]):
                    code = _GOOD
                elif _matches(buf, start, length, words[1, : words[1, 15]]):
                    code = _UNCERTAIN
                elif _matches(buf, start, length, words[2, : words[2, 15]]):
                    code = _BAD
                else:
                    return -1
            else:
                return -1
        elif key == KEY_SAMPLES:
            return -1  # an object holding a list: the general path reads it
        p = _skip_space(buf, p, end)
        if p < end and buf[p] == 44:  # ','
            p = _skip_space(buf, p + 1, end)
            continue
        if p < end and buf[p] == 125:  # '}'
            p += 1
            break
        return -1
    if not found_ts or not found_value:
        return -1
    quality[n] = code
    return p


@njit(cache=True, nogil=True)
def scan_json_samples(buf, starts, ends, keys, key_lengths, words, words_ok, ts_start, ts_length, ts_kind,
                      value_start, value_length, quality, counts):  # fmt: skip
    """Scan each message (buf[starts[m]:ends[m]]) into sample rows; counts[m] is its number of samples, or -1
    when the message is handed back. Returns the number of rows written."""
    n = 0
    for m in range(starts.shape[0]):
        first = n
        end = ends[m]
        p = _skip_space(buf, starts[m], end)
        ok = p < end
        if ok and buf[p] == 91:  # '['
            p = _skip_space(buf, p + 1, end)
            if p < end and buf[p] == 93:  # an empty list: the general path says so
                ok = False
            while ok:
                if p >= end or buf[p] != 123 or n >= ts_start.shape[0]:
                    ok = False
                    break
                p = _object(buf, p, end, keys, key_lengths, words, words_ok, n, ts_start, ts_length, ts_kind,
                            value_start, value_length, quality)  # fmt: skip
                if p < 0:
                    ok = False
                    break
                n += 1
                p = _skip_space(buf, p, end)
                if p < end and buf[p] == 44:
                    p = _skip_space(buf, p + 1, end)
                elif p < end and buf[p] == 93:
                    p += 1
                    break
                else:
                    ok = False
        elif ok and buf[p] == 123 and n < ts_start.shape[0]:  # '{'
            p = _object(buf, p, end, keys, key_lengths, words, words_ok, n, ts_start, ts_length, ts_kind,
                        value_start, value_length, quality)  # fmt: skip
            if p < 0:
                ok = False
            else:
                n += 1
        else:
            ok = False
        if ok and _skip_space(buf, p, end) != end:
            ok = False
        if ok:
            counts[m] = n - first
        else:
            counts[m] = -1
            n = first
    return n


def key_table(timestamp: str, value: str, quality: str, samples: str) -> tuple[np.ndarray, np.ndarray] | None:
    """The key names as a byte table for the scanner, or None when one is not plain ASCII without escapes."""
    names = [timestamp, value, quality, samples]
    try:
        encoded = [name.encode("ascii") for name in names]
    except UnicodeEncodeError:
        return None
    if any(b'"' in e or b"\\" in e or any(c < 32 for c in e) for e in encoded):
        return None
    table = np.zeros((4, max(len(e) for e in encoded) or 1), dtype=np.uint8)
    for row, e in enumerate(encoded):
        table[row, : len(e)] = np.frombuffer(e, dtype=np.uint8)
    return table, np.array([len(e) for e in encoded], dtype=np.int64)


def word_table() -> np.ndarray:
    """good / uncertain / bad as bytes, lengths in the last column."""
    table = np.zeros((3, 16), dtype=np.uint8)
    for row, word in enumerate((b"good", b"uncertain", b"bad")):
        table[row, : len(word)] = np.frombuffer(word, dtype=np.uint8)
        table[row, 15] = len(word)
    return table
