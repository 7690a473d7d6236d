"""Working covariance structures and their parameterisations.

A structure is a sum of independent components of the within-subject
covariance ``V_i`` (Diggle et al., 2002, ch. 5):

* random effects ``Z_i G Z_iᵀ`` with ``z_ij = 1`` (random intercept) or
  ``z_ij = (1, t_ij)`` (random intercept and slope, ``G`` unstructured);
* a stationary serial process with variance ``σ²`` and correlation
  ``ρ(u)`` at lag ``u`` — ``exp(-u/φ)`` ("exponential") or
  ``exp(-(u/φ)²)`` ("gaussian");
* independent measurement error with variance ``τ²`` (always present).

The structures are rows of one table (:func:`register_structure`, built-in rows
below); parameter lists, start values, nesting and likelihood-ratio reference
distributions (:mod:`analysis.models.compare`), the implied semivariogram and every
choice list (CLI help, the page's checklist) are derived from it. Correlation
shapes live in :data:`CORRELATION_SHAPES`; an unknown shape is a ModelError.

The optimiser works on an unconstrained vector ``θ``: the log-Cholesky
factor of ``G`` (log of diagonal entries, raw off-diagonal), ``log σ²``,
``log φ`` and ``log τ²``. Internally time is divided by a scale factor ``s``
for conditioning; :func:`natural_from_theta` and :func:`theta_from_natural`
convert between ``θ`` (internal time scale) and the named natural
parameters on the user's time scale.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ...errors import ModelError

#: Estimation criteria.
METHODS: tuple[str, ...] = ("reml", "ml")

#: Order in which natural parameters are listed.
PARAMETER_ORDER: tuple[str, ...] = (
    "intercept_var", "slope_var", "intercept_slope_cov", "serial_var", "range", "error_var",
)


# --------------------------------------------------------------------------- component tables
@dataclass(frozen=True)
class RandomEffects:
    """A random-effects component: ``q`` effects with columns (1, t)[:q], ``G`` unstructured."""

    q: int
    parameters: tuple[str, ...]


#: Random-effects components a structure can use.
RANDOM_EFFECTS: dict[str, RandomEffects] = {
    "none": RandomEffects(0, ()),
    "intercept": RandomEffects(1, ("intercept_var",)),
    "intercept+slope": RandomEffects(2, ("intercept_var", "slope_var", "intercept_slope_cov")),
}

#: Parameters of a serial process (variance σ², range φ).
SERIAL_PARAMETERS: tuple[str, ...] = ("serial_var", "range")
#: The measurement-error parameter every structure has.
ERROR_PARAMETERS: tuple[str, ...] = ("error_var",)
#: ``Structure.serial`` value meaning "a serial process with the shape the user chooses".
CHOSEN = "chosen"


@dataclass(frozen=True)
class CorrelationShape:
    """A serial correlation function ρ(u) = f(u/φ) and its derivative with respect to log φ.

    Both functions take ``x = u/φ`` (an array, x >= 0).
    """

    name: str
    label: str
    rho: Callable[[np.ndarray], np.ndarray]
    drho_dlogphi: Callable[[np.ndarray], np.ndarray]
    formula: str


#: Serial correlation functions, the only place a shape is defined.
CORRELATION_SHAPES: dict[str, CorrelationShape] = {
    "exponential": CorrelationShape("exponential", "exponential", lambda x: np.exp(-x),
                                    lambda x: x * np.exp(-x), "exp(-u/φ)"),
    "gaussian": CorrelationShape("gaussian", "Gaussian", lambda x: np.exp(-x * x),
                                 lambda x: 2.0 * x * x * np.exp(-x * x), "exp(-(u/φ)²)"),
}


@dataclass(frozen=True)
class Structure:
    """One row of the structures table.

    Attributes
    ----------
    name : str
        Name used by the CLI, the page, the JSON and the comparison tables.
    random : str
        Key of :data:`RANDOM_EFFECTS` ("none", "intercept", "intercept+slope").
    serial : str or None
        None (no serial process), :data:`CHOSEN` (serial process with the
        correlation shape chosen for the model set) or a key of
        :data:`CORRELATION_SHAPES` (a serial process with that shape always).
    label : str
        Plain-language label of the page's checklist and the CLI help.
    default : bool
        Whether it is among the structures fitted unless told otherwise.

    Every structure also has independent measurement error (τ²).
    """

    name: str
    random: str
    serial: str | None
    label: str
    default: bool = False


#: The structures table, simplest first (order of every choice list).
_TABLE: dict[str, Structure] = {}


def register_structure(structure: Structure) -> Structure:
    """Add a row to the structures table (everything else is derived from the table).

    Raises
    ------
    ModelError
        The name is taken, or a component is not known.
    """
    if structure.name in _TABLE:
        raise ModelError(f"structure {structure.name!r} is already registered")
    if structure.random not in RANDOM_EFFECTS:
        raise ModelError(f"structure {structure.name!r}: random effects {structure.random!r} not "
                         f"known; choose one of {list(RANDOM_EFFECTS)}")
    if structure.serial not in (None, CHOSEN, *CORRELATION_SHAPES):
        raise ModelError(f"structure {structure.name!r}: serial {structure.serial!r} not known; "
                         f"choose None, {CHOSEN!r} or one of {list(CORRELATION_SHAPES)}")
    _TABLE[structure.name] = structure
    return structure


def unregister_structure(name: str) -> None:
    """Remove a row added by :func:`register_structure` (for tests and plug-ins)."""
    _TABLE.pop(name, None)


def structure_table() -> tuple[Structure, ...]:
    """Every registered structure, in table order."""
    return tuple(_TABLE.values())


for _row in (
    Structure("independence", "none", None, "Independence (measurement error only)"),
    Structure("intercept", "intercept", None, "Random intercept", default=True),
    Structure("intercept+slope", "intercept+slope", None, "Random intercept + random slope",
              default=True),
    Structure("serial", "none", CHOSEN, "Serial correlation + measurement error"),
    Structure("intercept+serial", "intercept", CHOSEN,
              "Random intercept + serial + measurement error", default=True),
    Structure("intercept+slope+serial", "intercept+slope", CHOSEN,
              "Random intercept + slope + serial + measurement error", default=True),
):
    register_structure(_row)


class _LiveNames(Sequence):
    """Read-only view of a registry's names (stays current when rows are added)."""

    def __init__(self, registry: dict):
        self._registry = registry

    def __getitem__(self, i):
        return tuple(self._registry)[i]

    def __len__(self):
        return len(self._registry)

    def __contains__(self, name):
        try:
            return name in self._registry
        except TypeError:
            return False

    def __repr__(self):
        return repr(tuple(self._registry))


#: Working covariance structure names, simplest first (a live view of the table).
STRUCTURES: Sequence[str] = _LiveNames(_TABLE)
#: Serial correlation function names (a live view of :data:`CORRELATION_SHAPES`).
CORRELATIONS: Sequence[str] = _LiveNames(CORRELATION_SHAPES)


def default_structures() -> tuple[str, ...]:
    """Structures fitted unless told otherwise, in table order."""
    return tuple(s.name for s in _TABLE.values() if s.default)


def structure_labels() -> tuple[tuple[str, str], ...]:
    """(name, label) of every structure, in table order (the choice lists)."""
    return tuple((s.name, s.label) for s in _TABLE.values())


def correlation_shape(correlation: str) -> CorrelationShape:
    """The registered :class:`CorrelationShape` called ``correlation``.

    Raises
    ------
    ModelError
        The name is not registered.
    """
    try:
        return CORRELATION_SHAPES[correlation]
    except (KeyError, TypeError):
        raise ModelError(f"correlation {correlation!r} is not known; choose one of "
                         f"{list(CORRELATION_SHAPES)}") from None


@dataclass(frozen=True)
class StructureSpec:
    """What a working covariance structure is made of (derived from its table row).

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
    shape : str or None
        The serial correlation shape fixed by the structure, or None when it
        takes the shape chosen for the fit (or has no serial process).
    """

    name: str
    n_random: int
    serial: bool
    parameters: tuple[str, ...]
    shape: str | None = None

    @property
    def n_theta(self) -> int:
        """Number of free variance parameters."""
        return len(self.parameters)

    @property
    def min_subjects(self) -> int:
        """Fewest subjects the structure is fitted to: 2·(random effects) + 1."""
        return 2 * self.n_random + 1

    @property
    def n_variances(self) -> int:
        """Variance components a simpler structure can fix at 0: one per random effect, σ²."""
        return self.n_random + int(self.serial)

    def correlation_for(self, chosen: str) -> str | None:
        """The serial shape this structure uses when ``chosen`` is asked for (None: no serial)."""
        if not self.serial:
            return None
        return self.shape or chosen


def spec_for(structure: str) -> StructureSpec:
    """Describe ``structure`` (one of :data:`STRUCTURES`)."""
    row = _TABLE.get(structure) if isinstance(structure, str) else None
    if row is None:
        raise ModelError(f"structure {structure!r} is not known; choose one of {list(STRUCTURES)}")
    re_ = RANDOM_EFFECTS[row.random]
    serial = row.serial is not None
    params = re_.parameters + (SERIAL_PARAMETERS if serial else ()) + ERROR_PARAMETERS
    shape = row.serial if serial and row.serial != CHOSEN else None
    return StructureSpec(row.name, re_.q, serial, params, shape)


def correlation_function(lag: np.ndarray, phi: float, correlation: str) -> np.ndarray:
    """Serial correlation ρ(u) for lags ``u >= 0`` and range ``φ > 0`` (see
    :data:`CORRELATION_SHAPES`; an unknown name is a ModelError)."""
    shape = correlation_shape(correlation)
    return shape.rho(np.asarray(lag, dtype=float) / phi)


def correlation_dlogphi(lag: np.ndarray, phi: float, correlation: str) -> np.ndarray:
    """Derivative of ρ(u) with respect to log φ (an unknown name is a ModelError)."""
    shape = correlation_shape(correlation)
    return shape.drho_dlogphi(np.asarray(lag, dtype=float) / phi)


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
