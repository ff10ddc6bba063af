"""The plots' y-range follows the plateau, not the largest-field estimates."""

from fieldprop.numerics.extrapolate import richardson
from fieldprop.outputs.plots import PLATEAU_BARS, _plateau_range


def test_the_y_range_follows_the_plateau_not_the_drifting_large_fields():
    """Raw estimates 10 + h^2 terms, plus one far-off largest-field entry (a
    contaminated point, 10x off): the range shows the value +- a few bars and
    the nearby entries, and leaves the far-off one out."""
    values = [10.0 + 0.3 * h * h for h in (0.001, 0.002, 0.004)] + [100.0]
    est = richardson(values, 2.0, [1e-6] * 4)
    low, high = _plateau_range(est)
    assert low < est.value_au - PLATEAU_BARS * est.error_au * 0.99
    assert high > est.value_au + PLATEAU_BARS * est.error_au * 0.99
    assert high < 11.0  # the 100.0 entry is off the picture
    assert low <= min(values[:3]) <= max(values[:3]) <= high
