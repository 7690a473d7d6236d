"""Batched Gaussian (RE)ML log-likelihood with the fixed effects profiled out.

Subjects are grouped by number of visits ``n``; each group's covariance
matrices are built as one stack ``(m, n, n)`` and inverted together, so no
Python loop runs per subject (only per distinct visit count).

Log-likelihood convention (the same as statsmodels ``MixedLM.loglike`` and
``-½`` times lme4's deviance / REML criterion)::

    ML   : ℓ(θ) = −½ [ N log 2π + Σ log|V_i| + r̂ᵀV⁻¹r̂ ]
    REML : ℓ(θ) = −½ [ (N−p) log 2π + Σ log|V_i| + log|Σ X_iᵀV_i⁻¹X_i| + r̂ᵀV⁻¹r̂ ]

with ``β̂(θ) = (Σ XᵀV⁻¹X)⁻¹ Σ XᵀV⁻¹y`` and ``r̂ = y − Xβ̂``. (The REML
version omits ``+½ log|XᵀX|``, as both reference libraries do.)

Gradient (Harville, 1977; Verbeke & Molenberghs, 2000, §5.3), with
``V_k = ∂V/∂θ_k`` and ``a = V⁻¹r̂``::

    ∂ℓ/∂θ_k = −½ Σ tr(V⁻¹V_k) + ½ Σ aᵀV_k a  [+ ½ tr(M⁻¹ Σ XᵀV⁻¹V_kV⁻¹X) for REML]

where ``M = Σ XᵀV⁻¹X`` (envelope theorem: β̂ is a stationary point).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .structures import Components, StructureSpec, components, correlation_dlogphi, \
    correlation_function

LOG2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True, eq=False)
class Group:
    """Subjects sharing one visit count, stacked.

    Attributes
    ----------
    subjects : int array (m,)
        Subject codes.
    rows : int array (m, n)
        Panel row of each visit.
    X : (m, n, p); y : (m, n); Z : (m, n, q); lag : (m, n, n) absolute time
        differences (internal scale) or None without a serial component.
    """

    subjects: np.ndarray
    rows: np.ndarray
    X: np.ndarray
    y: np.ndarray
    Z: np.ndarray
    lag: np.ndarray | None


def build_groups(panel, X: np.ndarray, spec: StructureSpec, time_scale: float,
                 y: np.ndarray | None = None) -> list[Group]:
    """Index arrays and stacked data per visit-count group (built once per fit)."""
    y = panel.y if y is None else y
    t = panel.time / time_scale
    counts = panel.counts
    groups = []
    for n in np.unique(counts):
        subj = np.flatnonzero(counts == n)
        rows = panel.starts[subj][:, None] + np.arange(n)[None, :]
        tg = t[rows]
        q = spec.n_random
        Z = np.ones((subj.size, n, q))
        if q == 2:
            Z[:, :, 1] = tg
        lag = np.abs(tg[:, :, None] - tg[:, None, :]) if spec.serial else None
        groups.append(Group(subj, rows, X[rows], y[rows], Z, lag))
    return groups


def covariance_stack(g: Group, comp: Components, correlation: str) -> np.ndarray:
    """V_i = Z_i G Z_iᵀ + σ² R_i(φ) + τ² I for every subject of the group, (m, n, n)."""
    m, n = g.y.shape
    V = np.zeros((m, n, n))
    if comp.G.size:
        ZG = g.Z @ comp.G
        V += ZG @ np.swapaxes(g.Z, 1, 2)
    if g.lag is not None and comp.serial_var > 0:
        V += comp.serial_var * correlation_function(g.lag, comp.range, correlation)
    idx = np.arange(n)
    V[:, idx, idx] += comp.error_var
    return V


@dataclass(frozen=True, eq=False)
class Evaluation:
    """Everything computed at one θ.

    Attributes
    ----------
    loglik : float
    grad : ndarray (k,) or None
    beta : ndarray (p,)
    M : ndarray (p, p)
        Σ XᵀV⁻¹X.
    Vinv : list of (m, n, n) per group
    chol : list of (m, n, n) lower Cholesky factors per group
    resid : list of (m, n) marginal residuals y − Xβ̂ per group
    """

    loglik: float
    grad: np.ndarray | None
    beta: np.ndarray
    M: np.ndarray
    Vinv: list
    chol: list
    resid: list


class NotPositiveDefinite(ArithmeticError):
    """A covariance stack could not be factorised at this θ."""


def evaluate(groups: list[Group], spec: StructureSpec, theta: np.ndarray, *, correlation: str,
             method: str, gradient: bool = True, beta: np.ndarray | None = None) -> Evaluation:
    """Profiled log-likelihood (and gradient) at ``θ``.

    Parameters
    ----------
    groups : list of Group
    spec : StructureSpec
    theta : ndarray (k,)
        Unconstrained variance parameters (internal time scale).
    correlation : str
    method : {"reml", "ml"}
    gradient : bool
        Also compute ∂ℓ/∂θ.
    beta : ndarray, optional
        Use this β instead of the GLS estimate (no gradient then).

    Returns
    -------
    Evaluation
    """
    comp = components(spec, theta)
    p = groups[0].X.shape[2]
    M = np.zeros((p, p))
    Xy = np.zeros(p)
    logdet = 0.0
    n_obs = 0
    Vinvs, chols, Bs = [], [], []
    for g in groups:
        V = covariance_stack(g, comp, correlation)
        try:
            C = np.linalg.cholesky(V)
        except np.linalg.LinAlgError as exc:
            raise NotPositiveDefinite(str(exc)) from None
        logdet += 2.0 * float(np.log(np.diagonal(C, axis1=1, axis2=2)).sum())
        Vinv = np.linalg.inv(V)
        Vinv = 0.5 * (Vinv + np.swapaxes(Vinv, 1, 2))
        B = Vinv @ g.X
        M += np.einsum("mip,miq->pq", g.X, B)
        Xy += np.einsum("mip,mi->p", B, g.y)
        n_obs += g.y.size
        Vinvs.append(Vinv)
        chols.append(C)
        Bs.append(B)
    M = 0.5 * (M + M.T)
    if beta is None:
        beta = np.linalg.solve(M, Xy)
    quad = 0.0
    resid, avecs = [], []
    for g, Vinv in zip(groups, Vinvs):
        r = g.y - g.X @ beta
        a = np.einsum("mij,mj->mi", Vinv, r)
        quad += float(np.einsum("mi,mi->", r, a))
        resid.append(r)
        avecs.append(a)
    reml = method == "reml"
    if reml:
        ldM = np.linalg.slogdet(M)[1]
        ll = -0.5 * ((n_obs - p) * LOG2PI + logdet + ldM + quad)
    else:
        ll = -0.5 * (n_obs * LOG2PI + logdet + quad)
    grad = None
    if gradient:
        grad = _gradient(groups, spec, comp, correlation, reml, M, Vinvs, avecs, Bs)
    return Evaluation(float(ll), grad, beta, M, Vinvs, chols, resid)


def _gradient(groups, spec, comp, correlation, reml, M, Vinvs, avecs, Bs):
    """∂ℓ/∂θ, using the structure of each ∂V/∂θ_k to avoid (m, n, n) products where possible.

    Notes
    -----
    For a G entry, ∂V = Z dG Zᵀ, so the three traces collapse to
    Σ_ab dG_ab W_ab with W = Σ_i [−ZᵀV⁻¹Z + (Zᵀa)(Zᵀa)ᵀ + ZᵀB M⁻¹ BᵀZ] (last
    term REML only, B = V⁻¹X). For τ², ∂V = τ²I. Only the serial entries need
    the full stacks σ²R and σ²∂R/∂log φ.
    """
    q = spec.n_random
    p = M.shape[0]
    Minv = np.linalg.inv(M) if reml else None
    W = np.zeros((q, q))
    err = 0.0
    ser = np.zeros(2)
    for g, Vinv, a, B in zip(groups, Vinvs, avecs, Bs):
        if q:
            Zt = np.swapaxes(g.Z, 1, 2)
            VZ = Vinv @ g.Z
            W -= np.einsum("mia,mib->ab", g.Z, VZ)
            Za = np.einsum("mia,mi->ma", g.Z, a)
            W += Za.T @ Za
            if reml:
                ZB = Zt @ B
                W += np.einsum("map,pq,mbq->ab", ZB, Minv, ZB)
        val = -float(np.einsum("mii->", Vinv)) + float(np.einsum("mi,mi->", a, a))
        if reml:
            val += float(np.einsum("pq,mip,miq->", Minv, B, B, optimize=True))
        err += val
        if spec.serial:
            dR = (correlation_function(g.lag, comp.range, correlation),
                  correlation_dlogphi(g.lag, comp.range, correlation))
            for j, D in enumerate(dR):
                val = -float(np.einsum("mij,mij->", Vinv, D))
                Da = D @ a[:, :, None]
                val += float(np.einsum("mi,mi->", a, Da[:, :, 0]))
                if reml:
                    S = np.einsum("mip,miq->pq", B, D @ B)
                    val += float(np.einsum("pq,qp->", Minv, S))
                ser[j] += comp.serial_var * val
    grad = [0.5 * float(np.sum(dG * W)) for dG in comp.dG]
    if spec.serial:
        grad += [0.5 * ser[0], 0.5 * ser[1]]
    grad.append(0.5 * comp.error_var * err)
    return np.asarray(grad)
