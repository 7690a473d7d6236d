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

Two implementations share this module. :func:`evaluate` on a list of
:class:`Group` builds the n×n blocks (needed with a serial process);
on :class:`SubjectSums` (structures without one) it calls
:func:`evaluate_sums`, which never forms an n×n matrix: with
``V_i = τ²I + Z_iGZ_iᵀ`` everything is reduced to q×q (q ≤ 2) systems
built from per-subject cross-products (Woodbury identity and matrix
determinant lemma), so one evaluation costs O(N·p²).
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
    Vinv : list of (m, n, n) per group, or None (per-subject sums path)
    chol : list of (m, n, n) lower Cholesky factors per group, or None
    resid : list of (m, n) marginal residuals y − Xβ̂ per group, or None
    """

    loglik: float
    grad: np.ndarray | None
    beta: np.ndarray
    M: np.ndarray
    Vinv: list | None
    chol: list | None
    resid: list | None


class NotPositiveDefinite(ArithmeticError):
    """A covariance stack could not be factorised at this θ."""


def evaluate(groups, spec: StructureSpec, theta: np.ndarray, *, correlation: str,
             method: str, gradient: bool = True, beta: np.ndarray | None = None) -> Evaluation:
    """Profiled log-likelihood (and gradient) at ``θ``.

    Parameters
    ----------
    groups : list of Group, or SubjectSums
        Dense per-visit-count stacks, or per-subject sums (then
        :func:`evaluate_sums` does the work; ``correlation`` is unused).
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
    if isinstance(groups, SubjectSums):
        return evaluate_sums(groups, spec, theta, method=method, gradient=gradient, beta=beta)
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
    ll = _profiled_loglik(n_obs, logdet, quad, M, reml)
    grad = None
    if gradient:
        grad = _gradient(groups, spec, comp, correlation, reml, M, Vinvs, avecs, Bs)
    return Evaluation(float(ll), grad, beta, M, Vinvs, chols, resid)


def _profiled_loglik(n_obs, logdet, quad, M, reml):
    """ℓ from Σ log|V_i|, r̂ᵀV⁻¹r̂ and M = Σ XᵀV⁻¹X (module docstring convention)."""
    if reml:
        return -0.5 * ((n_obs - M.shape[0]) * LOG2PI + logdet + np.linalg.slogdet(M)[1] + quad)
    return -0.5 * (n_obs * LOG2PI + logdet + quad)


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


# ----------------------------------------------------------------------------- per-subject sums
@dataclass(frozen=True, eq=False)
class SubjectSums:
    """Per-subject cross-products for a structure without a serial process.

    With ``W = [X, y₀]`` (``y₀ = y − X·shift``, ``shift`` the OLS coefficients,
    which leaves the profiled likelihood unchanged and keeps the sums of
    squares of the residual size) and ``Z`` the random-effects design on the
    internal time scale. Per-subject q×q and q×(p+1) arrays are stored entry
    by entry along the subject axis (leading axes q), so that the q×q algebra
    runs as elementwise operations on length-m vectors.

    Attributes
    ----------
    q, p, n_obs : int
    counts : float array (m,)
        Visits per subject.
    shift : ndarray (p,)
    ZZ : (q, q, m)
        Z_iᵀZ_i.
    ZW : (q, m, p+1)
        Z_iᵀW_i.
    WW : (p+1, p+1)
        Σ_i W_iᵀW_i.
    tbar, stt : (m,)
        Subject mean time and centred sum of squares Σ(t − t̄)² (q = 2 only; used
        for determinants without cancellation).
    X, y0 : design and shifted response in panel row order; starts : (m,) first rows.
    """

    q: int
    p: int
    n_obs: int
    counts: np.ndarray
    shift: np.ndarray
    ZZ: np.ndarray
    ZW: np.ndarray
    WW: np.ndarray
    tbar: np.ndarray | None
    stt: np.ndarray | None
    X: np.ndarray
    y0: np.ndarray
    starts: np.ndarray


def build_sums(panel, X: np.ndarray, spec: StructureSpec, time_scale: float,
               y: np.ndarray | None = None) -> SubjectSums:
    """Per-subject sums for :func:`evaluate_sums` (built once per fit, O(N·p²))."""
    if spec.serial:
        raise ValueError("per-subject sums cannot represent a serial process; use build_groups")
    y = panel.y if y is None else y
    X = np.asarray(X, dtype=float)
    shift = np.linalg.lstsq(X, y, rcond=None)[0]
    y0 = y - X @ shift
    W = np.column_stack([X, y0])
    starts = panel.starts
    cnt = panel.counts.astype(float)
    m, q = cnt.size, spec.n_random
    ZZ = np.zeros((q, q, m))
    ZW = np.zeros((q, m, W.shape[1]))
    tbar = stt = None
    if q >= 1:
        ZZ[0, 0] = cnt
        ZW[0] = np.add.reduceat(W, starts, axis=0)
    if q == 2:
        t = panel.time / time_scale
        tbar = np.add.reduceat(t, starts) / cnt
        tc = t - np.repeat(tbar, panel.counts)
        stt = np.add.reduceat(tc * tc, starts)
        ZZ[0, 1] = ZZ[1, 0] = cnt * tbar
        ZZ[1, 1] = stt + cnt * tbar**2
        ZW[1] = np.add.reduceat(W * t[:, None], starts, axis=0)
    return SubjectSums(q, X.shape[1], int(y.size), cnt, shift, ZZ, ZW, W.T @ W, tbar, stt,
                       X, y0, starts)


def _small_system(sums: SubjectSums, comp: Components):
    """Inverse of P_i = τ²I + Z_iᵀZ_iG, (q, q, m), and Σ_i log|P_i|.

    Notes
    -----
    Push-through identity: Z_iᵀV_i⁻¹ = P_i⁻¹Z_iᵀ, and |V_i| = τ^{2(n_i−q)}|P_i|
    (matrix determinant lemma). For q = 2 the determinant is expanded as
    τ⁴ + τ²·tr(Z_iᵀZ_iG) + |Z_iᵀZ_i|·|G|, each term a sum of squares written
    with centred time (no cancellation; |Z_iᵀZ_i| = n_i·Σ(t − t̄)²), and the
    inverse is the adjugate over that determinant.
    """
    tau2, G, S = comp.error_var, comp.G, sums.ZZ
    if sums.q == 1:
        det = tau2 + S[0, 0] * G[0, 0]
        Pinv = (1.0 / det)[None, None, :]
    else:
        P = np.einsum("abm,bc->acm", S, G)
        n, tb, stt = sums.counts, sums.tbar, sums.stt
        (l00, _), (l10, l11) = comp.L
        trSG = n * (l00 + tb * l10)**2 + stt * l10**2 + (n * tb**2 + stt) * l11**2
        det = tau2 * tau2 + tau2 * trSG + n * stt * (l00 * l11)**2
        Pinv = np.empty_like(P)
        Pinv[0, 0], Pinv[1, 1] = P[1, 1] + tau2, P[0, 0] + tau2
        Pinv[0, 1], Pinv[1, 0] = -P[0, 1], -P[1, 0]
        Pinv /= det
    if not (np.all(det > 0) and np.all(np.isfinite(det))):
        raise NotPositiveDefinite("a per-subject covariance is not positive definite")
    return Pinv, float(np.log(det).sum())


def _rows_times(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Per-subject product A_i B_i for A (q, r, m) entrywise and B (r, m, k): (q, m, k)."""
    return np.stack([sum(A[a, b][:, None] * B[b] for b in range(A.shape[1]))
                     for a in range(A.shape[0])])


def evaluate_sums(sums: SubjectSums, spec: StructureSpec, theta: np.ndarray, *, method: str,
                  gradient: bool = True, beta: np.ndarray | None = None) -> Evaluation:
    """Profiled log-likelihood (and gradient) from per-subject sums, no n×n matrices.

    Notes
    -----
    With V = τ²I + ZGZᵀ, P = τ²I + ZᵀZG and H_i = P_i⁻¹Z_iᵀW_i = Z_iᵀV_i⁻¹W_i,
    ``V⁻¹ = (I − ZGZᵀV⁻¹)/τ²`` gives

        C = Σ WᵀV⁻¹W = [Σ WᵀW − T] / τ²,  T = Σ (ZᵀW)ᵀG H,
        D = Σ WᵀV⁻²W = [Σ WᵀW − T − Tᵀ + Σ (GH)ᵀZᵀZ(GH)] / τ⁴,
        Σ tr V⁻¹ = [N − tr(G Σ ZᵀV⁻¹Z)] / τ²,  ZᵀV⁻¹Z = P⁻¹ZᵀZ.

    M, Σ XᵀV⁻¹y and the quadratic form are blocks of C; with w = (−β̂, 1),
    Zᵀa = H w and Σ aᵀa = wᵀDw, Σ BᵀB = D_XX, so the gradient is the
    module-level formula with every n×n product replaced by these q×q and
    (p+1)×(p+1) ones. Sums over subjects are single matrix products over the
    stacked (q·m)-row arrays.
    """
    comp = components(spec, theta)
    tau2, G, q, p, N = comp.error_var, comp.G, sums.q, sums.p, sums.n_obs
    k = p + 1
    m = sums.counts.size
    if q:
        Pinv, logdetP = _small_system(sums, comp)
        H = _rows_times(Pinv, sums.ZW)                    # (q, m, k)
        GH = np.tensordot(G, H, axes=(1, 0))               # (q, m, k)
        T = sums.ZW.reshape(-1, k).T @ GH.reshape(-1, k)
        logdet = (N - q * m) * np.log(tau2) + logdetP
    else:
        T = 0.0
        logdet = N * np.log(tau2)
    C = (sums.WW - T) / tau2
    C = 0.5 * (C + C.T)
    M = C[:p, :p]
    if beta is None:
        d = np.linalg.solve(M, C[:p, p])
        beta = sums.shift + d
    else:
        beta = np.asarray(beta, dtype=float)
        d = beta - sums.shift
    w = np.append(-d, 1.0)
    quad = float(w @ C @ w)
    reml = method == "reml"
    ll = _profiled_loglik(N, logdet, quad, M, reml)
    grad = None
    if gradient:
        Minv = np.linalg.inv(M) if reml else None
        D = sums.WW.copy()
        if q:
            SGH = _rows_times(sums.ZZ, GH)
            D += GH.reshape(-1, k).T @ SGH.reshape(-1, k) - T - T.T
        D /= tau2 * tau2
        err = -N / tau2 + float(w @ D @ w)
        if reml:
            err += float(np.sum(Minv * D[:p, :p]))
        grad = []
        if q:
            ZVZ = np.einsum("abm,bcm->ac", Pinv, sums.ZZ)
            ZVZ = 0.5 * (ZVZ + ZVZ.T)
            err += float(np.sum(G * ZVZ)) / tau2
            Za = H @ w                                      # (q, m)
            Wg = Za @ Za.T - ZVZ
            if reml:
                HX = np.ascontiguousarray(H[:, :, :p]).reshape(q, -1)
                HXM = (H[:, :, :p].reshape(-1, p) @ Minv).reshape(q, -1)
                Wg += HX @ HXM.T
            grad = [0.5 * float(np.sum(dG * Wg)) for dG in comp.dG]
        grad.append(0.5 * tau2 * err)
        grad = np.asarray(grad)
    return Evaluation(float(ll), grad, beta, M, None, None, None)


def subject_scores(data, spec: StructureSpec, theta: np.ndarray, ev: Evaluation) -> np.ndarray:
    """Per-subject GLS scores X_iᵀV_i⁻¹(y_i − X_iβ) at ``ev.beta``, (m, p) (sandwich meat).

    Rows are in subject order for :class:`SubjectSums`, in group order for
    dense groups (the meat Σ u_iu_iᵀ does not depend on the order).
    """
    if not isinstance(data, SubjectSums):
        return np.concatenate([np.einsum("mip,mi->mp", Vinv @ g.X, r)
                               for g, Vinv, r in zip(data, ev.Vinv, ev.resid)])
    s = data
    comp = components(spec, theta)
    d = np.asarray(ev.beta) - s.shift
    r = s.y0 - s.X @ d
    u = np.add.reduceat(s.X * r[:, None], s.starts, axis=0)
    if s.q:
        Pinv, _ = _small_system(s, comp)
        Za = _rows_times(Pinv, s.ZW) @ np.append(-d, 1.0)          # Z_iᵀV_i⁻¹r_i, (q, m)
        GZa = comp.G @ Za
        u -= sum(GZa[a][:, None] * s.ZW[a, :, :s.p] for a in range(s.q))
    return u / comp.error_var


def bias_reduced_scores(groups, spec: StructureSpec, theta: np.ndarray, beta: np.ndarray,
                        Minv: np.ndarray, correlation: str) -> np.ndarray:
    """Per-subject scores XᵢᵀVᵢ⁻¹(I − Hᵢᵢ)⁻¹rᵢ with leverage-corrected residuals, (m, p).

    ``Hᵢᵢ = XᵢM⁻¹XᵢᵀVᵢ⁻¹`` is subject i's diagonal block of the GLS hat matrix
    (M = Σ XᵢᵀVᵢ⁻¹Xᵢ) and rᵢ = yᵢ − Xᵢβ̂. The meat Σ uᵢuᵢᵀ of these scores gives
    the bias-reduced sandwich of Mancl & DeRouen (2001, Biometrics 57, 126–134),
    the same correction as statsmodels GEE ``cov_type="bias_reduced"``.
    Each visit-count group is handled as one (m, n, n) stack.
    """
    comp = components(spec, theta)
    out = []
    for g in groups:
        V = covariance_stack(g, comp, correlation)
        Vinv = np.linalg.inv(V)
        B = Vinv @ g.X                                          # (m, n, p)
        H = g.X @ Minv @ np.swapaxes(B, 1, 2)                   # X M⁻¹ XᵀV⁻¹, (m, n, n)
        n = g.y.shape[1]
        r = g.y - g.X @ beta
        rt = np.linalg.solve(np.eye(n)[None] - H, r[:, :, None])[:, :, 0]
        out.append(np.einsum("mip,mi->mp", B, rt))
    return np.concatenate(out)
