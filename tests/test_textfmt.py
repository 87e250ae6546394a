"""Values with uncertainties printed to digits that mean something (no "± 0.00 pm")."""

import math

from livequant.textfmt import plus_minus


def test_uncertainty_sets_the_digits():
    assert plus_minus(390.53926969, 0.0069426, "pm") == "390.5393 ± 0.0069 pm"
    assert plus_minus(390.53926969, 0.25, "pm") == "390.54 ± 0.25 pm"
    assert plus_minus(390.5, 3.2, "pm") == "390.5 ± 3.2 pm"
    assert plus_minus(1234.5, 27.0) == "1234 ± 27"  # round half to even, as Python does
    assert plus_minus(89.9979, 0.0015254, "deg") == "89.9979 ± 0.0015 deg"
    assert "0.00 pm" not in plus_minus(390.539, 0.0012, "pm")


def test_missing_or_zero_uncertainty_is_said():
    assert plus_minus(390.5, 0.0, "pm") == "390.50 ± n/a pm"
    assert plus_minus(390.5, None, "pm") == "390.50 ± n/a pm"
    assert plus_minus(math.nan, 1.0, "pm") == "n/a pm"
    assert plus_minus(None, 1.0) == "n/a"
    assert plus_minus(1.0, 0.5, ascii_only=True) == "1.00 +- 0.50"


def test_the_display_keeps_one_significant_digit_but_never_prints_zero():
    from livequant.display.status import _pm

    assert _pm(390.5, 0.2) == "390.5 ± 0.2 pm"
    assert _pm(390.531, 0.02) == "390.53 ± 0.02 pm"  # was "390.5 ± 0.0 pm"
