"""The compiled JSON-number converter against CPython's ``float`` (correctly rounded: D. Gay, "Correctly
rounded binary-decimal and decimal-binary conversions", AT&T Numerical Analysis Manuscript 90-10, 1990,
which CPython's dtoa.c implements), bit for bit including the sign of zero, on seeded random corpora,
hard cases and hypothesis examples; the powers-of-five table against the published table of the
algorithm; and the JSON grammar (RFC 8259, section 6) for refusals."""

from __future__ import annotations

from decimal import Decimal, localcontext
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, seed, settings
from hypothesis import strategies as st

from streamguard import number_text
from streamguard.number_text import parse_spans


def _spans(texts: list[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A read-only buffer (as the decoder's) holding the texts with a separator, so spans do not touch."""
    encoded = [t.encode("utf-8") for t in texts]
    lengths = np.fromiter(map(len, encoded), dtype=np.int64, count=len(encoded))
    starts = np.zeros(len(encoded), dtype=np.int64)
    np.cumsum(lengths[:-1] + 1, out=starts[1:])
    return np.frombuffer(b",".join(encoded), dtype=np.uint8), starts, lengths


def _parse(texts: list[str]) -> np.ndarray | None:
    return parse_spans(*_spans(texts))


def _fallbacks(texts: list[str]) -> int:
    """Spans the kernel left to the Python fallback."""
    buffer, starts, lengths = _spans(texts)
    out = np.empty(len(texts))
    outcome = np.empty(len(texts), dtype=np.uint8)
    count = number_text.number_spans_kernel(buffer, starts, lengths, out, outcome, number_text.POWER5_HIGH,
                                            number_text.POWER5_LOW, number_text._EXACT_POWERS_OF_TEN)  # fmt: skip
    assert count >= 0
    return int(count)


def _assert_same_as_float(texts: list[str]) -> None:
    """Bitwise equality with float(text) (reference: CPython float, correctly rounded)."""
    got = _parse(texts)
    assert got is not None
    want = np.array([float(t) for t in texts], dtype=np.float64)
    wrong = np.flatnonzero(got.view(np.uint64) != want.view(np.uint64))
    assert wrong.size == 0, [(texts[i], got[i], want[i]) for i in wrong[:10]]


def _random_doubles(rng: np.random.Generator, n: int) -> np.ndarray:
    """Finite doubles from uniform bit patterns: every exponent equally likely, both signs."""
    x = rng.integers(0, 2**64, n, dtype=np.uint64, endpoint=False).view(np.float64)
    return x[np.isfinite(x)]


def _digit_strings(rng: np.random.Generator, n: int, low: int, high: int) -> list[str]:
    """n strings of low..high random decimal digits, the first not zero."""
    count = rng.integers(low, high + 1, n)
    digits = rng.integers(0, 10, (n, high)).astype(np.uint8) + 48
    digits[:, 0] = rng.integers(1, 10, n) + 48
    rows = digits.tobytes()
    return [rows[i * high : i * high + k].decode() for i, k in enumerate(count.tolist())]


# -- the powers-of-five table ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("q", "high", "low"),
    [
        # Entries of power_of_five_128 in fast_float's include/fast_float/fast_table.h (the table of Lemire
        # 2021 and Mushtak & Lemire 2023), read from the repository: both ends, both sides of the switch of
        # the reciprocal's scale at q = -27, and q = 27/28 where 5**q stops fitting 64 bits.
        (-342, 0xEEF453D6923BD65A, 0x113FAA2906A13B3F),
        (-341, 0x9558B4661B6565F8, 0x4AC7CA59A424C507),
        (-30, 0xA2425FF75E14FC31, 0xA1258379A94D028D),
        (-29, 0xCAD2F7F5359A3B3E, 0x096EE45813A04330),
        (-28, 0xFD87B5F28300CA0D, 0x8BCA9D6E188853FC),
        (-27, 0x9E74D1B791E07E48, 0x775EA264CF55347E),
        (-2, 0xA3D70A3D70A3D70A, 0x3D70A3D70A3D70A4),
        (-1, 0xCCCCCCCCCCCCCCCC, 0xCCCCCCCCCCCCCCCD),
        (0, 0x8000000000000000, 0x0),
        (1, 0xA000000000000000, 0x0),
        (27, 0xCECB8F27F4200F3A, 0x0),
        (28, 0x813F3978F8940984, 0x4000000000000000),
        (308, 0x8E679C2F5E44FF8F, 0x570F09EAA7EA7648),
    ],
)
def test_power_of_five_table_matches_published_entries(q: int, high: int, low: int) -> None:
    index = q + 342
    assert int(number_text.POWER5_HIGH[index]) == high
    assert int(number_text.POWER5_LOW[index]) == low


def test_power_of_five_table_brackets_the_exact_powers() -> None:
    """Definition (Lemire 2021, section 5): for q >= 0 the entry is 5**q's leading 128 bits, truncated; for
    q < 0 it is 2**k / 5**-q for its scale k to within one unit of the last word."""
    for q in range(-342, 309):
        value = (int(number_text.POWER5_HIGH[q + 342]) << 64) | int(number_text.POWER5_LOW[q + 342])
        assert value >> 127 == 1
        exact = Fraction(5) ** q
        k = 127 - (exact.numerator.bit_length() - exact.denominator.bit_length())  # value ~ exact * 2**k
        scaled = exact * Fraction(2) ** k
        while scaled >= 2**128:
            scaled /= 2
        while scaled < 2**127:
            scaled *= 2
        if q >= 0:
            assert value == int(scaled)  # truncated
        else:
            assert abs(value - scaled) < 1


# -- random corpora -------------------------------------------------------------------------------------


def test_repr_texts_of_random_doubles_across_the_whole_range() -> None:
    """About 300 000 repr() texts (shortest round-trip, up to 17 digits) of doubles with uniformly random bit
    patterns (the few NaN/inf patterns dropped), plus 50 000 subnormals: equal to float(text), which is the
    double itself (repr round-trips). Fallback: 0 of the 349 867 when measured; required below 1 %."""
    rng = np.random.default_rng(20240611)
    x = _random_doubles(rng, 300_000)
    subnormal_bits = rng.integers(1, 2**52, 50_000, dtype=np.uint64) | (
        rng.integers(0, 2, 50_000, dtype=np.uint64) << np.uint64(63)
    )
    x = np.concatenate([x, subnormal_bits.view(np.float64)])
    texts = [repr(v) for v in x.tolist()]
    _assert_same_as_float(texts)
    got = _parse(texts)
    assert got is not None and np.array_equal(got.view(np.uint64), x.view(np.uint64))
    assert _fallbacks(texts) < 0.01 * len(texts)


def test_short_decimals_with_random_exponents() -> None:
    """1..19 significant digits (w exact in uint64) with exponents -360..330, signed, some written with a
    fraction: the fast path, Eisel–Lemire, underflow to (signed) zero and overflow to inf.
    Fallback: 0 of 200 000 when measured."""
    rng = np.random.default_rng(7)
    n = 200_000
    digits = _digit_strings(rng, n, 1, 19)
    exponents = rng.integers(-360, 331, n).tolist()
    signs = rng.integers(0, 2, n).tolist()
    split = rng.integers(0, 3, n).tolist()
    texts = []
    for d, e, s, f in zip(digits, exponents, signs, split, strict=True):
        sign = "-" if s else ""
        if f == 0 or len(d) == 1:
            texts.append(f"{sign}{d}e{e}")
        elif f == 1:
            texts.append(f"{sign}{d[0]}.{d[1:]}E+{e}" if e >= 0 else f"{sign}{d[0]}.{d[1:]}E{e}")
        else:
            texts.append(f"{sign}0.{d}")  # plain fraction, no exponent
    _assert_same_as_float(texts)
    assert _fallbacks(texts) < 0.01 * len(texts)


def test_long_digit_strings_take_the_truncation_path() -> None:
    """20..40 significant digits: only the first 19 are kept and the value is bracketed by w and w + 1.
    Fallback when those round apart: 177 of 100 121 (0.18 %) when measured; required below 1 %."""
    rng = np.random.default_rng(11)
    n = 100_000
    digits = _digit_strings(rng, n, 20, 40)
    points = rng.integers(1, 41, n).tolist()
    exponents = rng.integers(-340, 300, n).tolist()
    texts = []
    for d, p, e in zip(digits, points, exponents, strict=True):
        p = min(p, len(d))
        body = d if p == len(d) else f"{d[:p]}.{d[p:]}"
        texts.append(f"{body}e{e}")
    # Leading and trailing zeros around few significant digits are not truncation.
    texts += ["0." + "0" * k + d for k, d in zip(range(0, 400, 7), digits, strict=False)]
    texts += [d[:3] + "0" * k for k, d in zip(range(17, 330, 5), digits, strict=False)]
    _assert_same_as_float(texts)
    assert 0 < _fallbacks(texts) < 0.01 * len(texts)


def test_exact_halfway_points_round_to_even() -> None:
    """Exact midpoints between adjacent doubles of magnitude 2**49..2**64 have at most 20 significant
    digits, so most reach Eisel–Lemire's round-half-to-even branch (q in [-4, 23], Lemire 2021, section
    8); the same midpoints nudged by one unit of a 25th digit must round away from the tie."""
    rng = np.random.default_rng(3)
    x = 2.0 ** rng.uniform(49, 64, 4000)  # log-uniform: every binade alike
    texts = []
    with localcontext() as context:
        context.prec = 60
        for v in x.tolist():
            midpoint = (Decimal(v) + Decimal(float(np.nextafter(v, np.inf)))) / 2
            texts.append(str(midpoint))
            nudge = Decimal(1).scaleb(midpoint.adjusted() - 24)
            texts.append(f"{midpoint + nudge:f}")
            texts.append(f"{midpoint - nudge:f}")
    # integer midpoints above 2**53, each just past a double, in the scientific form too
    for m in rng.integers(2**53, 2**63, 2000, dtype=np.uint64).tolist():
        step = 1 << (int(m).bit_length() - 53)
        tie = (m // step) * step + step // 2
        texts += [str(tie), f"{Decimal(tie):E}".replace("E+", "e")]
    _assert_same_as_float(texts)


# -- named hard cases -----------------------------------------------------------------------------------

_MIN_SUBNORMAL = float(Fraction(1, 2**1074))  # IEEE 754 binary64: 2**-1074
_MAX_FINITE = float((2 - Fraction(1, 2**52)) * 2**1023)

HARD_CASES = [
    # (text, value expected by IEEE 754 binary64 round-half-to-even); the reference for each is also float().
    ("9007199254740993", 9007199254740992.0),  # 2**53 + 1: halfway, to the even 2**53
    ("9007199254740995", 9007199254740996.0),  # 2**53 + 3: halfway, to the even 2**53 + 4
    ("9007199254740993.0000000000000000001", 9007199254740994.0),  # just past halfway (truncation path)
    ("2.2250738585072011e-308", float(Fraction(2**52 - 1, 2**1074))),  # largest subnormal region
    ("2.2250738585072012e-308", float(Fraction(1, 2**1022))),  # rounds up into the smallest normal
    ("2.4703282292062327e-324", 0.0),  # just below 2**-1075, half the smallest subnormal
    ("2.4703282292062328e-324", _MIN_SUBNORMAL),  # just above it
    ("4.9406564584124654e-324", _MIN_SUBNORMAL),
    ("1.7976931348623157e308", _MAX_FINITE),
    ("1.7976931348623158e308", _MAX_FINITE),  # below the overflow threshold (2 - 2**-53) * 2**1023
    ("1.7976931348623159e308", float("inf")),  # above it
    ("7.2057594037927933e16", 72057594037927936.0),  # 3 below 2**56, whose lower neighbour is 8 below
    ("1e23", float(Fraction(10**23))),  # not exact: 99999999999999991611392
    ("8.41e21", 8.41e21),  # the classic slow-path example: 841 * 10**19 > 2**53 with q = 19
    ("0", 0.0),
    ("-0", -0.0),
    ("-0.0", -0.0),
    ("0e999", 0.0),
    ("-0E-999", -0.0),
    ("1e-400", 0.0),
    ("-1e-400", -0.0),
    ("1e400", float("inf")),
    ("-1e400", float("-inf")),
    ("1e308", 1e308),
    ("1e-324", 0.0),
    ("3e-324", _MIN_SUBNORMAL),
    ("0." + "0" * 300 + "1", 1e-301),
    ("0." + "0" * 400 + "1", 0.0),
    ("0." + "0" * 323 + "5", _MIN_SUBNORMAL),  # 5e-324
    ("1" + "0" * 308, 1e308),
    ("1" + "0" * 309, float("inf")),
    ("1" + "0" * 30 + "e-30", 1.0),
    ("123456789012345678901234567890e-29", 1.2345678901234568),
    ("1e22", 1e22),  # the last exact power of ten (fast path)
    ("12.3456", 12.3456),
    ("-12.3456", -12.3456),
    ("18446744073709551615", 18446744073709551616.0),  # 2**64 - 1: 20 digits
    ("9999999999999999999", 1e19),  # 19 nines: the largest w
    ("1e99999999999999999999999", float("inf")),
    ("1e-99999999999999999999999", 0.0),
]


@pytest.mark.parametrize(("text", "expected"), HARD_CASES)
def test_hard_cases(text: str, expected: float) -> None:
    got = _parse([text])
    assert got is not None
    assert got.view(np.uint64)[0] == np.float64(float(text)).view(np.uint64)  # reference: CPython float()
    assert got.view(np.uint64)[0] == np.float64(expected).view(np.uint64)  # IEEE 754 rounding, worked above


def test_hard_cases_together_and_within_a_larger_buffer() -> None:
    """Spans read only their own bytes: a number followed by digits outside its span stays itself."""
    _assert_same_as_float([t for t, _v in HARD_CASES])
    buffer = np.frombuffer(b"12345e10", dtype=np.uint8)
    got = parse_spans(buffer, np.array([0, 1, 3, 0], dtype=np.int64), np.array([2, 1, 1, 5], dtype=np.int64))
    assert got is not None and got.tolist() == [12.0, 2.0, 4.0, 12345.0]


# -- hypothesis -------------------------------------------------------------------------------------------

_JSON_NUMBER = r"-?(0|[1-9][0-9]{0,30})(\.[0-9]{1,30})?([eE][+-]?[0-9]{1,3})?"


@seed(8259)
@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(allow_nan=False, allow_infinity=False).map(repr), min_size=1, max_size=20))
def test_hypothesis_repr_texts(texts: list[str]) -> None:
    """repr() of any finite double (reference: float(text), which is the double itself)."""
    _assert_same_as_float(texts)


@seed(8259)
@settings(max_examples=300, deadline=None)
@given(st.lists(st.from_regex(_JSON_NUMBER, fullmatch=True), min_size=1, max_size=20))
def test_hypothesis_json_grammar_texts(texts: list[str]) -> None:
    """Any text of the RFC 8259 number grammar (reference: float(text))."""
    _assert_same_as_float(texts)


# -- refusals and the wrapper ---------------------------------------------------------------------------

INVALID = ["01", "-01", "00", "1.", "1.e5", ".5", "-.5", "+1", "1e", "1e+", "1E-", "--1", "-", "", "nan", "NaN",
           "inf", "-Infinity", "0x10", "1_0", " 1", "1 ", "1\n", "1.5.5", "1e5.5", "1e5e5", "1.0f", "\u0661",
           "1,5", "e5", "0e", "-e1", "١٢"]  # fmt: skip


@pytest.mark.parametrize("text", INVALID)
def test_not_a_json_number_gives_none(text: str) -> None:
    """RFC 8259, section 6: -?(0|[1-9][0-9]*)(.[0-9]+)?([eE][+-]?[0-9]+)? and nothing else."""
    assert _parse([text]) is None
    assert _parse(["1.5", text, "2"]) is None


def test_wrapper_edges() -> None:
    empty = np.zeros(0, dtype=np.int64)
    got = parse_spans(np.zeros(0, dtype=np.uint8), empty, empty)
    assert got is not None and got.shape == (0,)
    buffer = np.frombuffer(b"1.5", dtype=np.uint8)
    with pytest.raises(ValueError):
        parse_spans(buffer, np.array([1]), np.array([3]))
    with pytest.raises(ValueError):
        parse_spans(buffer, np.array([-1]), np.array([2]))
    # int32 offsets and a writable buffer give the same result
    writable = np.frombuffer(bytearray(b"1.5"), dtype=np.uint8)
    got = parse_spans(writable, np.array([0], dtype=np.int32), np.array([3], dtype=np.int32))
    assert got is not None and got.tolist() == [1.5]
