"""One set of number formatters (analysis/numbers.py) and one confidence level (analysis/confidence.py)."""
import math

import numpy as np
import pytest
from scipy import stats

from analysis.confidence import CONFIDENCE_LEVEL, t_quantile, upper_tail, z_quantile
from analysis.numbers import (MINUS, compact, fixed, fmt, fmt_p, format_number, parse_number,
                              plain_number)


def test_z_quantile_inverts_the_normal_cdf():
    # independent check: the normal CDF written with math.erf gives back 0.5 + level/2
    for level in (0.8, CONFIDENCE_LEVEL, 0.99):
        z = z_quantile(level)
        assert 0.5 * (1 + math.erf(z / math.sqrt(2))) == pytest.approx(0.5 + level / 2, abs=1e-12)


def test_t_quantile_matches_scipy_and_tends_to_z():
    # reference library: scipy.stats.t.ppf; as df grows t tends to the normal quantile
    df = np.array([3.0, 10.0, 1e9])
    q = t_quantile(df)
    assert np.allclose(q, stats.t.ppf(0.975, df))
    assert q[-1] == pytest.approx(z_quantile(), abs=1e-6)


def test_level_outside_zero_one_is_refused():
    with pytest.raises(ValueError, match="confidence level"):
        upper_tail(1.0)


def test_format_number_significant_figures_and_true_minus():
    # hand-worked examples: 3 significant figures, trailing zeros dropped
    assert format_number(-0.012345) == MINUS + "0.0123"
    assert format_number(2.5) == "2.5"
    assert format_number(123456.0) == "123456"
    assert parse_number(format_number(-4.25, 4)) == -4.25


def test_fmt_and_fmt_p_blanks():
    # hand-worked: missing values and the p-value floor
    assert fmt(float("nan")) == "—" and fmt(None) == "" and fmt("a") == "a"
    assert fmt_p(0.00001) == "<\u00a00.0001" and fmt_p(0.0312) == "0.0312"


def test_compact_and_fixed_label_texts():
    # hand-worked: g-style exponent without '+', rounded fixed decimals, thousands separated
    assert compact(-1.5e7) == MINUS + "1.5e7"
    assert fixed(12345.678, 1) == "12,345.7"
    assert fixed(-0.0001, 2) == "0.00"


def test_plain_number_keeps_python_format_with_ascii_minus():
    # reference: Python's own format(); only the infinities differ
    for v in (-2.5, 0.1234567, 1e-7):
        assert plain_number(v) == format(v, "g")
        assert plain_number(v, ".4g") == format(v, ".4g")
    assert plain_number(-math.inf) == MINUS + "∞"


def test_edge_bin_side_rule_and_equal_width_edges():
    # hand-worked: edges 0, 1, 2, 3; an inner edge value goes to the bin above it, the last
    # edge stays in the last bin, values outside are clipped
    from analysis.exploration.lagbins import edge_bin, equal_width_edges

    edges = equal_width_edges(0.0, 3.0, 3)
    assert np.array_equal(edges, np.linspace(0.0, 3.0, 4))   # reference: numpy.linspace
    assert edge_bin([-1.0, 0.0, 0.999, 1.0, 2.5, 3.0, 9.0], edges).tolist() == [0, 0, 0, 1, 2, 2, 2]
    assert equal_width_edges(2.0, 2.0, 5).tolist() == [2.0, 3.0]


def test_equal_width_bins_over_the_range():
    # reference: numpy.histogram puts the same counts in equal-width bins over the range
    # (its last bin is closed too)
    from analysis.exploration.lagbins import equal_width_bins

    x = np.array([0.0, 0.5, 1.0, 1.5, 2.0, 2.0, 3.9, 4.0])
    edges, b = equal_width_bins(x, 4)
    counts, ref_edges = np.histogram(x, bins=4)
    assert np.allclose(edges, ref_edges)
    assert np.bincount(b, minlength=4).tolist() == counts.tolist()
