"""The shared argument checks: what each accepts, and a refusal that names the parameter,
the value and what is allowed (the error style every boundary of the code follows)."""

import math
import re

import numpy as np
import pytest

from monitor.model import validate


@pytest.mark.parametrize("bad", [True, "3", None, [1.0]])
def test_numbers_refuse_non_numbers(bad):
    # a JSON or TOML boolean is never a measurement (common practice); nor is a string
    for check in (validate.finite, validate.non_negative, validate.positive):
        with pytest.raises(ValueError, match=rf"^x must be a finite number.*got {re.escape(repr(bad))}\.$"):
            check(bad, "x")


def test_numbers_accept_python_and_numpy_reals():
    # NumPy scalars are real numbers (numpy.number hierarchy, NumPy reference)
    assert validate.positive(np.float32(2.5), "x") == 2.5
    assert validate.non_negative(np.int64(0), "x") == 0.0
    assert validate.finite(-3, "x") == -3.0


@pytest.mark.parametrize(("check", "value", "allowed"), [
    (validate.finite, math.inf, "a finite number"),
    (validate.non_negative, -1e-9, "a finite number >= 0"),
    (validate.positive, 0.0, "a finite number > 0"),
    (validate.positive, math.nan, "a finite number > 0"),
])
def test_number_refusals_name_what_is_allowed(check, value, allowed):
    # IEEE 754: inf and NaN are not finite; NaN compares false with everything
    with pytest.raises(ValueError, match=rf"^level must be {allowed}, got {value!r}\.$"):
        check(value, "level")


def test_in_range_ends():
    # interval notation (ISO 80000-2): ( ) excludes an end, [ ] includes it
    assert validate.in_range(0.0, "f", 0.0, 1.0, low_open=False) == 0.0
    with pytest.raises(ValueError, match=r"^f must lie in \(0, 1\), got 0\.0\.$"):
        validate.in_range(0.0, "f", 0.0, 1.0)
    assert validate.in_range(100.0, "p", 0.0, 100.0, high_open=False) == 100.0
    with pytest.raises(ValueError, match=r"^--tolerance must lie in \(0, 100\) %, got 100\.0\.$"):
        validate.in_range(100.0, "--tolerance", 0.0, 100.0, unit=" %")
    with pytest.raises(ValueError, match="nan"):
        validate.in_range(math.nan, "f", 0.0, 1.0)


def test_whole_number():
    # a count is an integer; 2.0 and True are refused (common practice)
    assert validate.whole_number(np.int32(4), "n") == 4
    for bad in (0, 2.0, True):
        with pytest.raises(ValueError, match=rf"^n must be a whole number >= 1, got {bad!r}\.$"):
            validate.whole_number(bad, "n")
    with pytest.raises(ValueError, match="from 1 to 64"):
        validate.whole_number(65, "pad_factor", maximum=64)


def test_frequency_and_sample_rate():
    # a sample rate is positive; a frequency may be 0 (DC) unless asked positive
    assert validate.frequency_hz(0, "f") == 0.0
    with pytest.raises(ValueError, match="f must be a positive finite frequency in Hz, got 0"):
        validate.frequency_hz(0, "f", positive=True)
    with pytest.raises(ValueError, match="fs_hz must be a positive finite sample rate in Hz"):
        validate.sample_rate_hz(-1.0)


def test_ordered_pair():
    # a band or a range: 0 <= low < high (common practice)
    assert validate.ordered_pair((10, 200.5), "band_hz") == (10.0, 200.5)
    assert validate.ordered_pair([3.0, 3.0], "r", allow_equal=True) == (3.0, 3.0)
    with pytest.raises(ValueError, match=r"^band_hz must be a pair \(low, high\) in Hz"):
        validate.ordered_pair(5.0, "band_hz")
    with pytest.raises(ValueError, match=r"^r must satisfy 0 <= low < high \(finite, r/min\)"):
        validate.ordered_pair((1500.0, 600.0), "r", "r/min")
    with pytest.raises(ValueError, match="low < high"):
        validate.ordered_pair((-1.0, 5.0), "r")


def test_real_samples():
    # float64 out without a copy when possible (numpy.ndarray.astype, copy=False)
    x = np.arange(20, dtype=np.float32)
    out = validate.real_samples(x, minimum=16)
    assert out.dtype == np.float64 and np.array_equal(out, x)
    with pytest.raises(ValueError, match="^s has 3 values; at least 16 samples are needed"):
        validate.real_samples(np.ones(3), "s", minimum=16)
    with pytest.raises(ValueError, match="sample 2 is nan"):
        validate.real_samples([0.0, 1.0, math.nan], "s")
    with pytest.raises(ValueError, match="real numbers"):
        validate.real_samples(np.ones(4, dtype=complex), "s")
