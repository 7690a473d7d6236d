"""Brute-force Gaussian log-likelihood of a dense marginal covariance (a test reference, not
code under test): the REML/ML formula written out with full-matrix inverses and determinants."""
from __future__ import annotations

import numpy as np


def gaussian_loglik(V: np.ndarray, X: np.ndarray, y: np.ndarray, method: str) -> float:
    """Profile log-likelihood of ``y ~ N(X β, V)`` at the GLS β̂; ``method`` "reml" or "ml"."""
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    beta = np.linalg.solve(M, X.T @ Vi @ y)
    r = y - X @ beta
    N, p = X.shape
    ll = -0.5 * (np.linalg.slogdet(V)[1] + r @ Vi @ r)
    if method == "reml":
        return ll - 0.5 * ((N - p) * np.log(2 * np.pi) + np.linalg.slogdet(M)[1])
    return ll - 0.5 * N * np.log(2 * np.pi)
