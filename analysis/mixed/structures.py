"""Working covariance structures and their parameterisations.

A structure is a sum of independent components of the within-subject
covariance ``V_i`` (Diggle et al., 2002, ch. 5):

* random effects ``Z_i G Z_iᵀ`` with ``z_ij = 1`` (random intercept) or
  ``z_ij = (1, t_ij)`` (random intercept and slope, ``G`` unstructured);
* a stationary serial process with variance ``σ²`` and correlation
  ``ρ(u)`` at lag ``u`` — ``exp(-u/φ)`` ("exponential") or
  ``exp(-(u/φ)²)`` ("gaussian");
* independent measurement error with variance ``τ²`` (always present).

The optimiser works on an unconstrained vector ``θ``: the log-Cholesky
factor of ``G`` (log of diagonal entries, raw off-diagonal), ``log σ²``,
``log φ`` and ``log τ²``. Internally time is divided by a scale factor ``s``
for conditioning; :func:`natural_from_theta` and :func:`theta_from_natural`
convert between ``θ`` (internal time scale) and the named natural
parameters on the user's time scale.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ModelError

#: Working covariance structures, simplest first.
STRUCTURES: tuple[str, ...] = (
    "independence",
    "intercept",
    "intercept+slope",
    "serial",
    "intercept+serial",
    "intercept+slope+serial",
)

#: Serial correlation functions ρ(u).
CORRELATIONS: tuple[str, ...] = ("exponential", "gaussian")

#: Estimation criteria.
METHODS: tuple[str, ...] = ("reml", "ml")

#: Order in which natural parameters are listed.
PARAMETER_ORDER: tuple[str, ...] = (
    "intercept_var", "slope_var", "intercept_slope_cov", "serial_var", "range", "error_var",
)


@dataclass(frozen=True)
class StructureSpec:
    """What a working covariance structure is made of.

    Attributes
    ----------
    name : str
        One of :data:`STRUCTURES`.
    n_random : int
        Number of random effects per subject (0, 1 = intercept, 2 = intercept and slope).
    serial : bool
        Whether a stationary serial process is included.
    parameters : tuple of str
        Names of the natural variance parameters, in :data:`PARAMETER_ORDER`.
    """

    name: str
    n_random: int
    serial: bool
    parameters: tuple[str, ...]

    @property
    def n_theta(self) -> int:
        """Number of free variance parameters."""
        return len(self.parameters)

    @property
    def min_subjects(self) -> int:
        """Fewest subjects the structure is fitted to: 2·(random effects) + 1."""
        return 2 * self.n_random + 1


def spec_for(structure: str) -> StructureSpec:
    """Describe ``structure`` (one of :data:`STRUCTURES`)."""
    if structure not in STRUCTURES:
        raise ModelError(f"structure {structure!r} is not known; choose one of {list(STRUCTURES)}")
    n_random = 2 if "slope" in structure else (1 if "intercept" in structure else 0)
    serial = "serial" in structure
    params = []
    if n_random >= 1:
        params.append("intercept_var")
    if n_random == 2:
        params += ["slope_var", "intercept_slope_cov"]
    if serial:
        params += ["serial_var", "range"]
    params.append("error_var")
    return StructureSpec(structure, n_random, serial, tuple(params))


def correlation_function(lag: np.ndarray, phi: float, correlation: str) -> np.ndarray:
    """Serial correlation ρ(u) for lags ``u >= 0`` and range ``φ > 0``.

    Notes
    -----
    exponential: ρ(u) = exp(−u/φ); gaussian: ρ(u) = exp(−(u/φ)²).
    """
    x = np.asarray(lag, dtype=float) / phi
    if correlation == "exponential":
        return np.exp(-x)
    if correlation == "gaussian":
        return np.exp(-x * x)
    raise ModelError(f"correlation {correlation!r} is not known; choose one of {list(CORRELATIONS)}")


def correlation_dlogphi(lag: np.ndarray, phi: float, correlation: str) -> np.ndarray:
    """Derivative of ρ(u) with respect to log φ.

    Notes
    -----
    exponential: (u/φ)·ρ(u); gaussian: 2(u/φ)²·ρ(u).
    """
    x = np.asarray(lag, dtype=float) / phi
    if correlation == "exponential":
        return x * np.exp(-x)
    return 2.0 * x * x * np.exp(-x * x)


@dataclass(frozen=True)
class Components:
    """Covariance components on the internal time scale.

    Attributes
    ----------
    G : ndarray (q, q)
        Random-effects covariance (q = 0, 1 or 2).
    serial_var, range : float
        σ² and φ of the serial process (0 and 1 when absent).
    error_var : float
        τ².
    dG : list of ndarray (q, q)
        dG/dθ_k for the first ``len(dG)`` entries of θ (the G block).
    L : ndarray (q, q)
        Lower Cholesky factor of G (G = LLᵀ) taken from θ.
    """

    G: np.ndarray
    serial_var: float
    range: float
    error_var: float
    dG: list
    L: np.ndarray


def components(spec: StructureSpec, theta: np.ndarray) -> Components:
    """Map unconstrained ``θ`` (internal scale) to covariance components and dG/dθ."""
    theta = np.asarray(theta, dtype=float)
    q = spec.n_random
    k = 0
    dG = []
    if q == 0:
        L = G = np.zeros((0, 0))
    elif q == 1:
        L = np.array([[np.exp(theta[0])]])
        G = L @ L.T
        dG.append(2.0 * G)
        k = 1
    else:
        l00, l10, l11 = np.exp(theta[0]), theta[1], np.exp(theta[2])
        L = np.array([[l00, 0.0], [l10, l11]])
        G = L @ L.T
        for E in (np.array([[l00, 0.0], [0.0, 0.0]]),
                  np.array([[0.0, 0.0], [1.0, 0.0]]),
                  np.array([[0.0, 0.0], [0.0, l11]])):
            dG.append(E @ L.T + L @ E.T)
        k = 3
    if spec.serial:
        sv, phi = float(np.exp(theta[k])), float(np.exp(theta[k + 1]))
        k += 2
    else:
        sv, phi = 0.0, 1.0
    tau2 = float(np.exp(theta[k]))
    return Components(G, sv, phi, tau2, dG, L)


def natural_from_theta(spec: StructureSpec, theta: np.ndarray, time_scale: float) -> dict:
    """Named natural parameters on the user's time scale from internal ``θ``.

    The slope variance is divided by s², the covariance by s and the range
    multiplied by s, where s is the internal time scale factor.
    """
    c = components(spec, theta)
    s = float(time_scale)
    out = {}
    if spec.n_random >= 1:
        out["intercept_var"] = float(c.G[0, 0])
    if spec.n_random == 2:
        out["slope_var"] = float(c.G[1, 1]) / s**2
        out["intercept_slope_cov"] = float(c.G[1, 0]) / s
    if spec.serial:
        out["serial_var"] = c.serial_var
        out["range"] = c.range * s
    out["error_var"] = c.error_var
    return out


def theta_from_natural(spec: StructureSpec, natural: dict, time_scale: float) -> np.ndarray:
    """Inverse of :func:`natural_from_theta` (G must be positive definite)."""
    s = float(time_scale)
    th = []
    if spec.n_random == 1:
        th.append(0.5 * np.log(natural["intercept_var"]))
    elif spec.n_random == 2:
        v0 = natural["intercept_var"]
        v1 = natural["slope_var"] * s**2
        c = natural["intercept_slope_cov"] * s
        l00 = np.sqrt(v0)
        l10 = c / l00
        rem = v1 - l10**2
        if rem <= 0:
            raise ModelError("random-effects covariance is not positive definite")
        th += [np.log(l00), l10, 0.5 * np.log(rem)]
    if spec.serial:
        th += [np.log(natural["serial_var"]), np.log(natural["range"] / s)]
    th.append(np.log(natural["error_var"]))
    return np.asarray(th, dtype=float)
