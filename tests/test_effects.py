"""Effect statements: arithmetic of each transform checked against numpy, wording from the sign."""
import re
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from analysis.models.effects import (CAUTION, effect_statement, effect_steps, format_number,
                              interaction_summary, parse_number)
from analysis.errors import ModelError

_NUM = re.compile(r"[−-]?\d+(?:\.\d+)?(?:e[−-]?\d+)?")
LABELS = dict(covariate_label="baseline marker", response_label="eGFR",
              response_unit="mL/min/1.73m²", time_unit="months")


def _numbers(text):
    return [parse_number(s) for s in _NUM.findall(text.replace("1.73m²", "").replace("2.718", "").replace("95% CI", ""))]


@pytest.mark.parametrize("transform,step", [("none", "Each one-unit increase in"),
                                            ("log2", "Each doubling of"),
                                            ("log10", "Each ten-fold increase in")])
def test_single_step_transforms(transform, step):
    est, lo, hi = -0.0412, -0.0634, -0.0190
    s = effect_statement(est, lo, hi, transform=transform, **LABELS, mean_slope=-0.1)
    assert s.startswith(f"{step} baseline marker")
    # reference: numpy rounding to 3 significant figures of the given numbers
    np.testing.assert_allclose(_numbers(s)[:3], [est, lo, hi], rtol=5e-3)
    assert "per month" in s and "model-based SE" in s and "steeper decline" in s
    assert s.endswith(CAUTION)


def test_log_adds_per_doubling_with_ln2():
    est, lo, hi = -0.0577, -0.0866, -0.0289
    s = effect_statement(est, lo, hi, transform="log", **LABELS, se_kind="robust")
    nums = _numbers(s)
    # reference: numpy ln 2 conversion
    np.testing.assert_allclose(nums[:3], [est, lo, hi], rtol=5e-3)
    np.testing.assert_allclose(nums[3:6], np.array([est, lo, hi]) * np.log(2), rtol=5e-3)
    steps = effect_steps(est, lo, hi, transform="log")
    np.testing.assert_allclose(steps[1].factor, np.log(2), rtol=1e-15)
    assert "e-fold" in s and "each doubling of baseline marker" in s and "robust SE" in s


def test_direction_words_and_null_wording():
    assert "slower decline" in effect_statement(0.02, 0.01, 0.03, transform="log2", **LABELS,
                                                mean_slope=-0.1)
    assert "faster rise" in effect_statement(0.02, 0.01, 0.03, transform="log2", **LABELS,
                                             mean_slope=0.3)
    assert "slower rise" in effect_statement(-0.02, -0.03, -0.01, transform="log2", **LABELS,
                                             mean_slope=0.3)
    s = effect_statement(-0.01, -0.03, 0.01, transform="log2", **LABELS)
    assert "no clear evidence of a difference in slope" in s and "decline" not in s
    # a "log2(...)" wrapper is read as the covariate's own name
    s = effect_statement(-0.01, -0.03, 0.01, transform="log2",
                         **{**LABELS, "covariate_label": "log2(marker)"})
    assert "Each doubling of marker" in s


def test_format_number_round_trip():
    for v in (-0.0400, 0.00693, 123.456, -1.5e-7, 0.0):
        # reference: numpy relative comparison at 3 significant figures
        np.testing.assert_allclose(parse_number(format_number(v)), v, rtol=5e-3, atol=0)
    assert format_number(-0.04) == "−0.04"


def test_interaction_summary_from_fixed_frame():
    ff = pd.DataFrame({"term": ["intercept", "time", "time × x"],
                       "estimate": [50.0, -0.1, -0.04], "se": [1, 0.01, 0.01],
                       "robust_se": [1, 0.01, 0.02],
                       "lo": [48, -0.12, -0.0596], "hi": [52, -0.08, -0.0204],
                       "robust_lo": [48, -0.12, -0.0792], "robust_hi": [52, -0.08, -0.0008],
                       "p": [0, 0, 6e-5], "robust_p": [0, 0, 0.045]})
    fit = SimpleNamespace(fixed_frame=lambda: ff, label="fake")
    r = interaction_summary(fit, term="time × x", transform="log2", **LABELS)
    assert r.estimate == -0.04 and r.mean_slope == -0.1
    # reference: the numbers placed in the frame above, recovered from each statement
    np.testing.assert_allclose(_numbers(r.robust_statement)[:3], [-0.04, -0.0792, -0.0008],
                               rtol=5e-3)
    assert "robust (sandwich) SE" in r.robust_statement and r.to_json()["p"] == 6e-5
    with pytest.raises(ModelError, match="term 'time × z' is not in the model"):
        interaction_summary(fit, term="time × z", transform="log2", **LABELS)
    with pytest.raises(ModelError, match="transform == 'sqrt'"):
        effect_steps(1.0, 0.0, 2.0, transform="sqrt")
