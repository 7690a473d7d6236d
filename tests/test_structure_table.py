"""The structures table: a new structure is one registered row, everything else follows.

References: an independent dense brute-force likelihood written here (full block-diagonal
covariance with scipy.linalg.block_diag, the (RE)ML formula of Verbeke & Molenberghs 2000,
§5.3, maximised by scipy.optimize), the Self & Liang (1987) / Stram & Lee (1994) boundary
mixtures for one added random effect, and the hand-written nesting table the code used to
carry (reproduced below as data, not taken from the code).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg as sla
from scipy import optimize

from analysis.models.compare import NESTED, nested_table, nesting
from analysis.errors import ModelError
from analysis.models.mixed import fit_mixed
from analysis.models.mixed.simulate import simulate_cohort
from analysis.models.mixed.structures import (STRUCTURES, Structure, correlation_function,
                                       register_structure, spec_for, unregister_structure)
from analysis.models.modelstage import CHOICE_FIELDS, ModelChoices

NEW = "intercept+gaussian-serial"


@pytest.fixture
def registered():
    """A random intercept plus a serial process that is always Gaussian, as one table row."""
    row = register_structure(Structure(NEW, random="intercept", serial="gaussian",
                                       label="Random intercept + Gaussian serial + error"))
    try:
        yield row
    finally:
        unregister_structure(NEW)
    assert NEW not in STRUCTURES


@pytest.fixture(scope="module")
def small():
    return simulate_cohort(30, seed=5, visits=(2, 6), follow_up=24.0, range=6.0)


def _dense_loglik(panel, X, nat, method):
    """Random intercept + Gaussian serial + error, dense (brute force)."""
    blocks = []
    for s, n in zip(panel.starts, panel.counts):
        t = panel.time[s:s + n]
        u = np.abs(t[:, None] - t[None, :]) / nat["range"]
        blocks.append(np.eye(n) * nat["error_var"] + nat["intercept_var"]
                      + nat["serial_var"] * np.exp(-u * u))
    V = sla.block_diag(*blocks)
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    beta = np.linalg.solve(M, X.T @ Vi @ panel.y)
    r = panel.y - X @ beta
    N, p = X.shape
    ll = -0.5 * (np.linalg.slogdet(V)[1] + r @ Vi @ r)
    if method == "reml":
        return ll - 0.5 * ((N - p) * np.log(2 * np.pi) + np.linalg.slogdet(M)[1])
    return ll - 0.5 * N * np.log(2 * np.pi)


def _dense_fit(panel, X, method):
    keys = ("intercept_var", "serial_var", "range", "error_var")

    def f(x):
        with np.errstate(over="ignore"):
            return -_dense_loglik(panel, X, dict(zip(keys, np.exp(x))), method)

    best = optimize.minimize(f, np.log([100.0, 20.0, 5.0, 20.0]), method="Nelder-Mead",
                             options={"xatol": 1e-9, "fatol": 1e-11, "maxiter": 20000,
                                      "maxfev": 20000})
    best = optimize.minimize(f, best.x, method="BFGS", options={"gtol": 1e-8})
    return -best.fun


def test_a_registered_structure_fits_and_matches_the_dense_likelihood(registered, small):
    spec = spec_for(NEW)
    assert spec.parameters == ("intercept_var", "serial_var", "range", "error_var")
    # the row fixes the shape: asking for exponential still fits the Gaussian process
    fit = fit_mixed(small.panel, small.X, names=small.names, structure=NEW,
                    correlation="exponential", method="reml")
    assert fit.converged, fit.message
    assert fit.correlation == "gaussian"
    # independent brute force: dense formula maximised by Nelder-Mead + BFGS
    np.testing.assert_allclose(fit.loglik, _dense_fit(small.panel, small.X, "reml"), rtol=1e-6)
    np.testing.assert_allclose(_dense_loglik(small.panel, small.X, fit.variance, "reml"),
                               fit.loglik, rtol=1e-10)
    # implied semivariogram: τ² + σ²(1 − exp(−(u/φ)²)) (Diggle et al. 2002, §5.2)
    v, u = fit.variance, np.array([0.5, 3.0, 12.0])
    np.testing.assert_allclose(
        fit.variogram_curve(u),
        v["error_var"] + v["serial_var"] * (1 - np.exp(-(u / v["range"]) ** 2)), rtol=1e-12)


def test_a_registered_structure_is_offered_everywhere(registered):
    assert NEW in CHOICE_FIELDS["structures"].values()
    assert (NEW, registered.label) in CHOICE_FIELDS["structures"].options()
    assert ModelChoices(structures=(NEW,)).structures == (NEW,)
    from app.cli import build_parser
    from app.sections.models import models_section

    assert NEW in str(models_section())            # the page's checklist
    # CLI: accepted by --models
    args = build_parser().parse_args(["fit", "demo", "--json", "-", "--models", NEW])
    from app.cli import _model_choices
    assert _model_choices(args).structures == (NEW,)


def test_a_registered_structure_gets_its_nesting(registered):
    # one random effect added on top of the Gaussian serial process: 50:50 χ²(0)/χ²(1)
    # (Self & Liang 1987, case 5; Stram & Lee 1994)
    n = nesting("serial", NEW)
    assert (n.df, n.n_boundary, n.mixture) == (1, 1, ((0.5, 0), (0.5, 1)))
    # serial process added to a random intercept: range unidentified under the null, naive χ²
    n = nesting("intercept", NEW)
    assert (n.df, n.n_boundary, n.mixture) == (2, 1, None)
    # nested in the richest structure (its serial shape is checked fit by fit)
    assert nesting(NEW, "intercept+slope+serial").df == 2
    # same components, only the shape may differ: not nested (compare by AIC/BIC)
    assert nesting("intercept+serial", NEW) is None and nesting(NEW, "intercept+serial") is None
    assert any(x.alt == NEW for x in nested_table())


def test_a_registered_structure_in_a_model_set(registered, small):
    from analysis.models.modelling import fit_candidates

    class Cohort:                                    # the least a model set needs
        panel = small.panel
        import pandas as pd
        baseline = pd.DataFrame({"x": np.random.default_rng(1).normal(
            size=small.panel.n_subjects)})

    ms = fit_candidates(Cohort(), structures=("intercept", NEW), correlation="both", gee=())
    # one fit of the new row (its shape is fixed), one of the random intercept
    assert [c.name for c in ms.candidates] == ["intercept (REML)",
                                               f"{NEW} (gaussian, REML)"]
    assert [(t.null, t.alt) for t in ms.lrts] == [("intercept (REML)",
                                                               f"{NEW} (gaussian, REML)")]


#: the nesting table the project carried by hand before it was derived (as data)
HAND_TABLE = {
    ("independence", "intercept"): (1, 1, ((0.5, 0), (0.5, 1))),
    ("intercept", "intercept+slope"): (2, 1, ((0.5, 1), (0.5, 2))),
    ("serial", "intercept+serial"): (1, 1, ((0.5, 0), (0.5, 1))),
    ("intercept+serial", "intercept+slope+serial"): (2, 1, ((0.5, 1), (0.5, 2))),
    ("independence", "intercept+slope"): (3, 2, None),
    ("serial", "intercept+slope+serial"): (3, 2, None),
    ("independence", "serial"): (2, 1, None),
    ("intercept", "intercept+serial"): (2, 1, None),
    ("intercept+slope", "intercept+slope+serial"): (2, 1, None),
    ("independence", "intercept+serial"): (3, 2, None),
    ("intercept", "intercept+slope+serial"): (4, 2, None),
    ("independence", "intercept+slope+serial"): (5, 3, None),
}


def test_derived_nesting_equals_the_former_hand_table():
    assert {(n.null, n.alt): (n.df, n.n_boundary, n.mixture) for n in NESTED} == HAND_TABLE


def test_an_unknown_correlation_name_is_a_model_error():
    with pytest.raises(ModelError, match="correlation 'spherical' is not known"):
        correlation_function(np.array([1.0]), 2.0, "spherical")


def test_a_row_with_unknown_components_is_refused():
    with pytest.raises(ModelError, match="random effects 'slope'"):
        register_structure(Structure("odd", random="slope", serial=None, label="odd"))
    with pytest.raises(ModelError, match="already registered"):
        register_structure(Structure("intercept", random="intercept", serial=None, label="x"))
    assert "odd" not in STRUCTURES
