"""Number formats: constants, exhaustive rounding against framework casts, ulp against numpy."""
import numpy as np
import pytest
import torch

from refops.numerics import FORMATS, accumulator_for, get_format, round_to, ulp, ulp_distance

# The 16- and 8-bit formats and the torch dtype whose cast is the reference for each.
TORCH_DTYPES = {"float16": torch.float16, "bfloat16": torch.bfloat16,
                "float8_e4m3": torch.float8_e4m3fn, "float8_e5m2": torch.float8_e5m2}
STORAGE = {16: (np.uint16, torch.int16), 8: (np.uint8, torch.uint8)}


def all_values(name):
    """Every bit pattern of a 16- or 8-bit format, decoded by torch, as float64."""
    dtype = TORCH_DTYPES[name]
    bits = 8 * torch.empty((), dtype=dtype).element_size()
    numpy_int, torch_int = STORAGE[bits]
    patterns = np.arange(2 ** bits, dtype=np.int64).astype(numpy_int)
    decoded = torch.from_numpy(patterns.view(np.int16) if bits == 16 else patterns)
    return decoded.to(torch_int).view(dtype).double().numpy()


def torch_round(values32, name):
    # Reference: torch's cast from float32 (a single rounding: torch's float64 -> half casts
    # go through float32, so only float32 inputs give an exact reference).
    return torch.from_numpy(values32).to(TORCH_DTYPES[name]).double().numpy()


def between_neighbours(finite):
    """Exact midpoints of neighbouring values, just above and below them, and quarter points,
    all exactly representable in float32."""
    values = np.unique(finite)
    low, high = values[:-1], values[1:]
    mid = ((low + high) / 2).astype(np.float32)
    assert np.array_equal(mid.astype(np.float64), (low + high) / 2)   # midpoints are exact
    return np.concatenate([mid, np.nextafter(mid, np.float32(np.inf)),
                           np.nextafter(mid, np.float32(-np.inf)),
                           ((3 * low + high) / 4).astype(np.float32),
                           ((low + 3 * high) / 4).astype(np.float32)])


def beyond_max(fmt):
    top = fmt.max + ulp(fmt.max, fmt)
    edges = np.array([fmt.max, (fmt.max + top) / 2, top, 2 * top, 1e30, np.inf, np.nan])
    with np.errstate(over="ignore"):
        return np.concatenate([edges, -edges]).astype(np.float32)


@pytest.mark.parametrize("name", list(TORCH_DTYPES))
def test_every_bit_pattern_is_a_fixed_point(name):
    values = all_values(name)
    assert np.array_equal(round_to(values, name), values, equal_nan=True)


@pytest.mark.parametrize("name", list(TORCH_DTYPES))
def test_constants_match_the_decoded_patterns(name):
    fmt = get_format(name)
    values = all_values(name)
    positive = values[np.isfinite(values) & (values > 0)]
    # Reference: the decoded bit patterns (torch) give max, smallest subnormal, smallest normal.
    assert positive.max() == fmt.max
    assert positive.min() == fmt.smallest_subnormal
    normal_gaps = np.diff(np.unique(positive))
    assert fmt.tiny == positive[np.searchsorted(np.unique(positive), fmt.tiny)]
    assert normal_gaps.min() == fmt.smallest_subnormal
    assert fmt.saturates == (not np.isinf(values).any())


@pytest.mark.parametrize("name", list(TORCH_DTYPES))
def test_rounding_between_neighbours_matches_torch(name):
    fmt = get_format(name)
    values = all_values(name)
    finite = values[np.isfinite(values)]
    probes = np.concatenate([between_neighbours(finite), beyond_max(fmt)])
    # Reference: torch casts to float16, bfloat16, float8_e4m3fn, float8_e5m2 from float32.
    expected = torch_round(probes, name)
    got = round_to(probes, name)
    mismatch = ~((got == expected) | (np.isnan(got) & np.isnan(expected)))
    assert not mismatch.any(), (probes[mismatch][:5], got[mismatch][:5], expected[mismatch][:5])
    numbers = ~np.isnan(expected)                   # a NaN's sign is not specified
    assert np.array_equal(np.signbit(got[numbers]), np.signbit(expected[numbers]))


def test_e4m3_saturates_on_overflow_and_infinity():
    # Reference: OCP 8-bit floating point specification, saturating conversion to E4M3
    # (max 448); torch.float8_e4m3fn's cast does the same.
    x = np.array([449.0, 464.0, 465.0, 1e6, np.inf, -np.inf, -500.0])
    assert np.array_equal(round_to(x, "float8_e4m3"), [448, 448, 448, 448, 448, -448, -448])
    assert np.array_equal(torch_round(x.astype(np.float32), "float8_e4m3"),
                          round_to(x, "float8_e4m3"))


def test_e5m2_overflows_to_infinity():
    # Reference: OCP 8-bit floating point specification, E5M2 (max 57344, has infinities);
    # 61440 is the midpoint between 57344 and 2**16 and ties to the even neighbour, infinity.
    x = np.array([57344.0, 61439.0, 61440.0, 1e6])
    assert np.array_equal(round_to(x, "float8_e5m2"), [57344, 57344, np.inf, np.inf])


def test_float16_from_float64_rounds_once():
    # Reference: numpy's float64 -> float16 conversion rounds directly (no float32 step). round_to
    # uses that cast for float16; the significand rounding it uses for bfloat16 and the 8-bit
    # formats must agree with it (and with the float32 cast) on midpoints and near-midpoints.
    from refops.numerics.formats import _round_significand
    rng = np.random.default_rng(0)
    values = all_values("float16")
    finite = np.unique(values[np.isfinite(values)])
    mid = (finite[:-1] + finite[1:]) / 2
    offsets = mid * 2.0 ** -30                       # below float32 resolution at the midpoint
    probes = np.concatenate([mid, mid + offsets, mid - offsets, [65520.0, -65520.0, 65519.99],
                             rng.standard_normal(20000) * 10.0 ** rng.integers(-9, 6, 20000)])
    with np.errstate(over="ignore"):
        expected = probes.astype(np.float16).astype(np.float64)
    assert np.array_equal(round_to(probes, "float16"), expected)
    assert np.array_equal(_round_significand(probes, get_format("float16")), expected)
    wide = np.concatenate([probes, rng.standard_normal(20000) * 10.0 ** rng.integers(-45, 38, 20000)])
    with np.errstate(over="ignore"):
        expected32 = wide.astype(np.float32).astype(np.float64)
    assert np.array_equal(_round_significand(wide, get_format("float32")), expected32)
    assert np.array_equal(round_to(wide, "float32"), expected32)


def test_bfloat16_from_float64_rounds_once():
    # Worked example: 1 + 2**-8 + 2**-40 lies above the midpoint of 1 and 1 + 2**-7, so it rounds
    # up; rounding through float32 first would land on the midpoint and tie down to 1.
    assert round_to(np.array([1 + 2 ** -8 + 2 ** -40]), "bfloat16")[0] == 1 + 2 ** -7
    assert round_to(np.array([1 + 2 ** -8]), "bfloat16")[0] == 1.0             # tie to even
    assert round_to(np.array([1 + 3 * 2 ** -8]), "bfloat16")[0] == 1 + 2 ** -6  # tie to even


def test_float32_rounding_matches_numpy():
    # Reference: numpy float64 -> float32 conversion (IEEE round to nearest even).
    rng = np.random.default_rng(1)
    base = (rng.standard_normal(50000) * 10.0 ** rng.integers(-45, 39, 50000)).astype(np.float32)
    up = np.nextafter(base, np.float32(np.inf))
    mid = (base.astype(np.float64) + up.astype(np.float64)) / 2
    probes = np.concatenate([base.astype(np.float64), mid, np.nextafter(mid, 0), np.nextafter(mid, 1e40),
                             [3.5e38, 3.4028235677973366e38, 1e-46, 7e-46, -7.1e-46]])
    with np.errstate(over="ignore"):
        expected = probes.astype(np.float32).astype(np.float64)
    assert np.array_equal(round_to(probes, "float32"), expected)


def test_rounding_keeps_shape_and_float32_input():
    x = np.arange(12, dtype=np.float32).reshape(3, 4) / 7
    out = round_to(x, "bfloat16")
    assert out.shape == (3, 4) and out.dtype == np.float64
    assert np.array_equal(out, torch_round(x.ravel(), "bfloat16").reshape(3, 4))


# Reference: IEEE 754-2019 binary64/32/16 (p = 53, 24, 11; emax = 1023, 127, 15); bfloat16
# (p = 8, emax = 127); OCP 8-bit floating point specification E4M3 (p = 4, max 448, min normal
# 2**-6, min subnormal 2**-9) and E5M2 (p = 3, max 57344, min normal 2**-14, min subnormal 2**-16).
PUBLISHED = {
    "float64": (2.0 ** -53, 1.7976931348623157e308, 2.0 ** -1022, 2.0 ** -1074),
    "float32": (2.0 ** -24, 3.4028234663852886e38, 2.0 ** -126, 2.0 ** -149),
    "float16": (2.0 ** -11, 65504.0, 2.0 ** -14, 2.0 ** -24),
    "bfloat16": (2.0 ** -8, 3.3895313892515355e38, 2.0 ** -126, 2.0 ** -133),
    "float8_e4m3": (2.0 ** -4, 448.0, 2.0 ** -6, 2.0 ** -9),
    "float8_e5m2": (2.0 ** -3, 57344.0, 2.0 ** -14, 2.0 ** -16),
}


@pytest.mark.parametrize("name", list(PUBLISHED))
def test_published_constants(name):
    fmt = get_format(name)
    assert (fmt.unit_roundoff, fmt.max, fmt.tiny, fmt.smallest_subnormal) == PUBLISHED[name]
    assert fmt.eps == 2 * fmt.unit_roundoff


@pytest.mark.parametrize("name", ["float64", "float32", "float16"])
def test_constants_match_numpy_finfo(name):
    # Reference: numpy.finfo (IEEE 754-2019).
    info, fmt = np.finfo(name), get_format(name)
    assert (fmt.eps, fmt.max, fmt.tiny, fmt.smallest_subnormal) == (
        float(info.eps), float(info.max), float(info.tiny), float(info.smallest_subnormal))


def test_accumulator_is_float32_below_float32():
    # common practice: half-precision layers accumulate in float32.
    assert {n: accumulator_for(n).name for n in FORMATS} == {
        "float64": "float64", "float32": "float32", "float16": "float32", "bfloat16": "float32",
        "float8_e4m3": "float32", "float8_e5m2": "float32"}


def test_ulp_matches_numpy_spacing_for_float16():
    values = all_values("float16")
    finite = values[np.isfinite(values) & (values >= 0) & (values < 65504)]
    # Reference: numpy.spacing on float16 (distance to the next larger value; numpy's float16
    # spacing of a negative power of two measures toward zero, so only |x| is compared).
    expected = np.abs(np.spacing(finite.astype(np.float16)).astype(np.float64))
    assert np.array_equal(ulp(finite, "float16"), expected)


@pytest.mark.parametrize("name", ["float32", "float64"])
def test_ulp_matches_numpy_spacing(name):
    rng = np.random.default_rng(2)
    x = (rng.standard_normal(20000) * 10.0 ** rng.integers(-40, 38, 20000)).astype(name)
    x = np.concatenate([x, np.array([0.0, 1.0, 2.0 ** -126, 2.0 ** -140], dtype=name)])
    # Reference: numpy.spacing.
    assert np.array_equal(ulp(x, name), np.abs(np.spacing(x)).astype(np.float64))


@pytest.mark.parametrize("name", ["bfloat16", "float8_e4m3", "float8_e5m2"])
def test_ulp_is_the_gap_to_the_next_value(name):
    values = np.unique(all_values(name))
    values = values[np.isfinite(values) & (values >= 0)]
    # Reference: gaps between neighbouring decoded bit patterns (torch).
    assert np.array_equal(ulp(values[:-1], name), np.diff(values))


def test_ulp_distance():
    one_up = float(np.nextafter(np.float16(1), np.float16(2)))
    a = np.array([one_up, 1.0, np.inf, np.inf, np.nan, np.nan, 3.0, 1.0 + 1.5 * 2 ** -10])
    b = np.array([1.0, 1.0, np.inf, -np.inf, np.nan, 1.0, np.inf, 1.0])
    assert np.array_equal(ulp_distance(a, b, "float16"), [1, 0, 0, np.inf, 0, np.inf, np.inf, 1.5])


BAD_CALLS = [
    ("unknown-name", lambda: get_format("float12"), ValueError, r"fmt='float12': unknown format"),
    ("not-a-name", lambda: get_format(16), TypeError, r"fmt=16"),
    ("integer-array", lambda: round_to(np.arange(3), "float16"), TypeError, r"x=array.*floating"),
    ("list-input", lambda: ulp([1.0], "float16"), TypeError, r"x=\[1.0\]: expected a numpy array"),
]


@pytest.mark.parametrize("call, kind, message", [c[1:] for c in BAD_CALLS],
                         ids=[c[0] for c in BAD_CALLS])
def test_bad_arguments(call, kind, message):
    with pytest.raises(kind, match=message):
        call()
