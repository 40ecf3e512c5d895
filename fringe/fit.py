"""Weighted nonlinear least-squares fit of a fringe model to a binned profile.

The model for a bin i in strip j, holding pixels with mean coordinates (u_i, v_i) and
within-bin variance var_i of u, is

    m_i = S_j(xi_i) + g_i A_j(xi_i) cos(omega u_i + kappa v_i + phi),
    g_i = exp(-omega^2 var_i / 2),

where S_j and A_j are Legendre series of order K in the normalised coordinate xi
(the background-plus-envelope and the fringe amplitude, slowly varying), omega = 2 pi / P
along the projection normal, kappa a small phase gradient along the fringes (a rotation
of the true normal against the projection direction) and phi the phase at the reference
point. g_i is the mean of the cosine over the pixels of the bin (second order in the
u spread, exact for a Gaussian spread).

The three nonlinear parameters are found by variable projection (the linear series
coefficients are solved exactly for every trial), then the full covariance of all
parameters comes from the weighted Jacobian at the solution.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import legendre as _leg

from fringe.profile import Profile

__all__ = ["FitResult", "fit_profile", "choose_order"]


@dataclass
class FitResult:
    """Parameters, covariance and fit statistics of the fringe model.

    Attributes
    ----------
    omega, kappa, phi : float
        Nonlinear parameters (rad/px, rad/px, rad).
    a, b : (J, K+1) ndarray
        Legendre coefficients of S_j and A_j in each strip.
    cov : (3 + 2 J (K+1), 3 + 2 J (K+1)) ndarray
        Covariance of ``[omega, kappa, phi, a.ravel(), b.ravel()]``, scaled by the reduced
        chi-square when that exceeds one.
    chi2, dof : float, int
        Weighted residual sum of squares and degrees of freedom.
    order : int
        Legendre order K.
    """

    omega: float
    kappa: float
    phi: float
    a: np.ndarray
    b: np.ndarray
    cov: np.ndarray
    chi2: float
    dof: int
    order: int
    xi_scale: tuple[float, float]
    kappa_free: bool
    cov_scale: float = 1.0
    warnings: list[str] = field(default_factory=list)

    @property
    def chi2_red(self) -> float:
        return self.chi2 / max(self.dof, 1)

    def xi(self, u: np.ndarray) -> np.ndarray:
        mid, half = self.xi_scale
        return (np.asarray(u, dtype=np.float64) - mid) / half

    def model(self, u: np.ndarray, v: np.ndarray, strip: np.ndarray,
              u_var: np.ndarray | None = None) -> np.ndarray:
        """Evaluate the model at coordinates (pixels when ``u_var`` is None)."""
        basis = _leg.legvander(self.xi(u), self.order)
        s = np.einsum("ik,ik->i", basis, self.a[strip])
        amp = np.einsum("ik,ik->i", basis, self.b[strip])
        psi = self.omega * u + self.kappa * v + self.phi
        g = 1.0 if u_var is None else np.exp(-0.5 * self.omega**2 * u_var)
        return s + g * amp * np.cos(psi)


def _design(prof: Profile, order: int, xi: np.ndarray, omega: float, kappa: float,
            phi: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    basis = _leg.legvander(xi, order)
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v + phi
    return basis, g, psi


def _solve_linear(prof, weights, basis, g, psi, n_strips):
    """Per strip, the weighted linear least-squares solution for (a_j, b_j)."""
    k1 = basis.shape[1]
    a = np.zeros((n_strips, k1))
    b = np.zeros((n_strips, k1))
    resid = np.empty_like(prof.mean)
    cosp = g * np.cos(psi)
    for j, sel in enumerate(_strip_slices(prof, n_strips)):
        if sel.stop <= sel.start:
            continue
        w = weights[sel]
        design = np.hstack([basis[sel], basis[sel] * cosp[sel, None]]) * w[:, None]
        target = prof.mean[sel] * w
        coef = _lsq(design, target)
        a[j], b[j] = coef[:k1], coef[k1:]
        resid[sel] = target - design @ coef
    return a, b, resid


def _strip_slices(prof: Profile, n_strips: int) -> list[slice]:
    """Bins are stored strip by strip (see `project`): one slice per strip."""
    bounds = np.searchsorted(prof.strip, np.arange(n_strips + 1))
    return [slice(int(bounds[j]), int(bounds[j + 1])) for j in range(n_strips)]


def _lsq(design: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Linear least squares by the normal equations (well conditioned: Legendre basis),
    falling back to an SVD solution when they are singular."""
    gram = design.T @ design
    rhs = design.T @ target
    try:
        from scipy.linalg import LinAlgError as _SciErr
        from scipy.linalg import cho_factor, cho_solve

        return cho_solve(cho_factor(gram, check_finite=False), rhs, check_finite=False)
    except (np.linalg.LinAlgError, _SciErr, ValueError):
        return np.linalg.lstsq(design, target, rcond=None)[0]


def _initial_phase(prof, weights, xi, order, omega, kappa, n_strips):
    """Phase (and along-fringe gradient) from a linear fit with cos and sin terms."""
    basis = _leg.legvander(xi, order)
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v
    k1 = basis.shape[1]
    z_strip = np.zeros(n_strips, dtype=complex)
    v_strip = np.zeros(n_strips)
    n_tot = np.zeros(n_strips)
    for j in range(n_strips):
        sel = prof.strip == j
        if sel.sum() < 3 * k1 + 2:
            continue
        w = weights[sel]
        c = g[sel] * np.cos(psi[sel])
        s = g[sel] * np.sin(psi[sel])
        bj = basis[sel]
        design = np.hstack([bj, bj * c[:, None], bj * s[:, None]]) * w[:, None]
        coef, *_ = np.linalg.lstsq(design, prof.mean[sel] * w, rcond=None)
        cc, ss = coef[k1:2 * k1], coef[2 * k1:]
        # A cos(psi + phi) = A cos(phi) cos(psi) - A sin(phi) sin(psi)
        zc = (bj @ cc) - 1j * (bj @ ss)
        z_strip[j] = np.sum(zc * prof.count[sel])
        v_strip[j] = np.average(prof.v[sel], weights=prof.count[sel])
        n_tot[j] = prof.count[sel].sum()
    good = n_tot > 0
    total = z_strip[good].sum()
    phi0 = float(np.angle(total))
    dkappa = 0.0
    if good.sum() >= 2:
        ph = np.unwrap(np.angle(z_strip[good] * np.exp(-1j * phi0)))
        vv = v_strip[good]
        wts = np.abs(z_strip[good])
        if np.ptp(vv) > 0:
            dkappa = float(np.polyfit(vv, ph, 1, w=np.sqrt(wts))[0])
    return phi0, dkappa


def fit_profile(
    prof: Profile,
    *,
    omega0: float,
    order: int = 2,
    sigma: np.ndarray | None = None,
    kappa_free: bool | None = None,
    kappa0: float = 0.0,
    phi0: float | None = None,
) -> FitResult:
    """Fit the fringe model to a profile by weighted nonlinear least squares.

    Parameters
    ----------
    prof : Profile
        Binned profile (see `fringe.profile.project`).
    omega0 : float
        Starting angular frequency, rad/px (2 pi / period).
    order : int
        Legendre order K of the slowly varying background and amplitude.
    sigma : (M,) ndarray, optional
        Standard uncertainty of each bin mean. Default: from ``prof.var_mean`` when
        present, otherwise equal per-pixel weights (sigma proportional to 1/sqrt(count)).
    kappa_free : bool, optional
        Fit the phase gradient along the fringes (default when the profile has several
        strips).
    kappa0, phi0 : float
        Starting values.

    Returns
    -------
    FitResult

    Notes
    -----
    Variable projection: for every trial (omega, kappa, phi) the Legendre coefficients are
    the exact weighted linear least-squares solution, and the nonlinear parameters are
    iterated by the trust-region reflective method with a finite-difference Jacobian of
    the projected residual. The covariance of all parameters is the inverse of JᵀJ of the
    weighted residual at the solution, multiplied by max(1, chi²/dof) (the bins may be
    noisier than the per-pixel model says, e.g. for correlated noise).

    References
    ----------
    .. [1] G. H. Golub and V. Pereyra, "The differentiation of pseudo-inverses and
       nonlinear least squares problems whose variables separate", SIAM J. Numer. Anal.
       10(2), 413-432 (1973). doi:10.1137/0710036
    .. [2] S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory,
       Prentice Hall (1993), sec. 7.6 and example 3.14 (the sinusoid model and its bound).
    """
    from scipy.optimize import least_squares

    n_strips = prof.n_strips
    if kappa_free is None:
        kappa_free = n_strips > 1
    lo, hi = prof.u_range
    xi_scale = (0.5 * (lo + hi), max(0.5 * (hi - lo), 1e-9))
    xi = (prof.u - xi_scale[0]) / xi_scale[1]
    if sigma is None:
        if prof.var_mean is not None:
            sigma = np.sqrt(np.maximum(prof.var_mean, 1e-300))
        else:
            sigma = 1.0 / np.sqrt(prof.count)
    weights = 1.0 / sigma

    if phi0 is None:
        phi0, dk = _initial_phase(prof, weights, xi, order, omega0, kappa0, n_strips)
        if kappa_free:
            kappa0 = kappa0 + dk

    def unpack(theta):
        if kappa_free:
            return theta[0], theta[1], theta[2]
        return theta[0], 0.0, theta[1]

    def resid(theta):
        om, ka, ph = unpack(theta)
        basis, g, psi = _design(prof, order, xi, om, ka, ph)
        return _solve_linear(prof, weights, basis, g, psi, n_strips)[2]

    theta0 = np.array([omega0, kappa0, phi0] if kappa_free else [omega0, phi0])
    span = max(hi - lo, 1.0)
    scale = np.array([1.0 / span, 1.0 / span, 1.0] if kappa_free else [1.0 / span, 1.0])
    sol = least_squares(resid, theta0, x_scale=scale, method="trf", xtol=1e-12, ftol=1e-12,
                        gtol=1e-12, max_nfev=200)
    om, ka, ph = unpack(sol.x)
    basis, g, psi = _design(prof, order, xi, om, ka, ph)
    a, b, r = _solve_linear(prof, weights, basis, g, psi, n_strips)

    # Make the pooled amplitude positive (the sign belongs to the phase).
    if np.sum(b[:, 0] * np.bincount(prof.strip, weights=prof.count, minlength=n_strips)) < 0:
        b = -b
        ph = ph + np.pi
        psi = psi + np.pi
    ph = float(np.angle(np.exp(1j * ph)))

    # Full weighted Jacobian for the covariance.
    k1 = order + 1
    m = prof.mean.size
    n_par = 3 + 2 * n_strips * k1
    jac = np.zeros((m, n_par))
    amp = np.einsum("ik,ik->i", basis, b[prof.strip])
    sinp, cosp = np.sin(psi), np.cos(psi)
    jac[:, 0] = -g * amp * sinp * prof.u - om * prof.u_var * g * amp * cosp
    jac[:, 1] = -g * amp * sinp * prof.v
    jac[:, 2] = -g * amp * sinp
    rows = np.arange(m)
    for k in range(k1):
        jac[rows, 3 + prof.strip * k1 + k] = basis[:, k]
        jac[rows, 3 + n_strips * k1 + prof.strip * k1 + k] = g * basis[:, k] * cosp
    if not kappa_free:
        jac[:, 1] = 0.0
    jw = jac * weights[:, None]
    used = np.any(jw != 0, axis=0)
    info = jw[:, used].T @ jw[:, used]
    try:
        cov_u = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        cov_u = np.linalg.pinv(info)
    cov = np.zeros((n_par, n_par))
    cov[np.ix_(used, used)] = cov_u
    chi2 = float(r @ r)
    dof = int(m - used.sum())
    scale_c = max(1.0, chi2 / max(dof, 1))
    return FitResult(
        omega=float(om),
        kappa=float(ka),
        phi=ph,
        a=a,
        b=b,
        cov=cov * scale_c,
        chi2=chi2,
        dof=dof,
        order=order,
        xi_scale=xi_scale,
        kappa_free=bool(kappa_free),
        cov_scale=scale_c,
    )


def choose_order(
    prof: Profile,
    *,
    omega0: float,
    sigma: np.ndarray,
    max_order: int,
    kappa: float = 0.0,
    phi: float | None = None,
) -> tuple[int, FitResult | None]:
    """Choose the Legendre order by the Bayesian information criterion.

    Orders 0, 1, 2, ... up to ``max_order`` are fitted; the one with the smallest
    chi² + p ln(M) wins (p parameters, M bins). With ``phi`` given the fringe frequency
    and phase are held at (omega0, kappa, phi) and only the linear coefficients are
    solved for each order (fast); otherwise each order gets a full fit.

    References
    ----------
    .. [1] G. Schwarz, "Estimating the dimension of a model", Ann. Stat. 6(2), 461-464
       (1978). doi:10.1214/aos/1176344136
    """
    best = None
    m = prof.mean.size
    orders = [k for k in (0, 1, 2, 3, 4, 5, 6, 8, 10, 12) if k <= max_order] or [0]
    worse = 0
    lo, hi = prof.u_range
    xi = (prof.u - 0.5 * (lo + hi)) / max(0.5 * (hi - lo), 1e-9)
    for k in orders:
        if phi is None:
            fit = fit_profile(prof, omega0=omega0, order=k, sigma=sigma)
            chi2 = fit.chi2
        else:
            fit = None
            basis, g, psi = _design(prof, k, xi, omega0, kappa, phi)
            r = _solve_linear(prof, 1.0 / sigma, basis, g, psi, prof.n_strips)[2]
            chi2 = float(r @ r)
        p = 3 + 2 * prof.n_strips * (k + 1)
        bic = chi2 + p * np.log(m)
        if best is None or bic < best[0]:
            best = (bic, k, fit)
            worse = 0
        else:
            worse += 1
            if worse >= 2:
                break
    return best[1], best[2]


@dataclass
class EnvelopeFit:
    """Single-aperture (sinc²) envelope fitted to a pooled profile.

    ``m(u) = bg + I0 sinc²((u - u0)/W) (1 + V g cos(omega u + kappa v + phi))``: the first
    zeros of the envelope lie at u0 ± W (px along the normal).
    """

    u0: float
    u0_err: float
    width: float
    width_err: float
    visibility: float
    visibility_err: float
    background: float
    peak: float
    chi2: float
    dof: int


def _sinc2_design(prof: Profile, u0: float, width: float, omega: float, kappa: float):
    env = np.sinc((prof.u - u0) / width) ** 2
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v
    return np.vstack([np.ones_like(env), env, env * g * np.cos(psi), env * g * np.sin(psi)]).T


def fit_sinc2_envelope(
    prof: Profile,
    *,
    omega: float,
    kappa: float,
    phi: float,
    sigma: np.ndarray,
    u_peak: float,
) -> EnvelopeFit | None:
    """Fit the two-slit Fraunhofer form with a sinc² single-slit envelope.

    Parameters
    ----------
    prof : Profile
        Pooled (single-strip) profile.
    omega, kappa, phi : float
        Fringe parameters from the main fit (starting values).
    sigma : (M,) ndarray
        Uncertainty of each bin mean.
    u_peak : float
        Envelope peak from the main fit (starting value of the centre).

    Returns
    -------
    EnvelopeFit or None
        None when the fit fails or the envelope is not resolved in the region.

    Notes
    -----
    The Fraunhofer pattern of two slits of width a, centre separation d is
    I(theta) = I0 (sin beta / beta)² cos² alpha with beta = pi a sin(theta)/lambda and
    alpha = pi d sin(theta)/lambda; near the axis the envelope zeros are a distance
    W = lambda L/a from the centre, while the fringe period is lambda L/d.

    References
    ----------
    .. [1] E. Hecht, Optics, 5th ed., Pearson (2017), sec. 10.2.2.
    """
    from scipy.optimize import least_squares

    lo, hi = prof.u_range
    span = hi - lo
    w_sig = 1.0 / sigma
    best = None
    for wf in np.geomspace(0.15, 3.0, 24):
        width = wf * span / 2
        for du in np.linspace(-0.1, 0.1, 5) * span:
            des = _sinc2_design(prof, u_peak + du, width, omega, kappa)
            coef, *_ = np.linalg.lstsq(des * w_sig[:, None], prof.mean * w_sig, rcond=None)
            r = (prof.mean - des @ coef) * w_sig
            c2 = float(r @ r)
            if best is None or c2 < best[0]:
                best = (c2, u_peak + du, width, coef)
    _, u0, width, coef = best
    bg, i0, cc, ss = coef
    if i0 <= 0:
        return None
    vis = float(np.hypot(cc, ss) / i0)
    ph = float(np.arctan2(-ss, cc))

    def resid(p):
        bg_, i0_, u0_, w_, v_, om_, ph_ = p
        env = np.sinc((prof.u - u0_) / w_) ** 2
        g = np.exp(-0.5 * om_**2 * prof.u_var)
        m = bg_ + i0_ * env * (1 + v_ * g * np.cos(om_ * prof.u + kappa * prof.v + ph_))
        return (prof.mean - m) * w_sig

    p0 = np.array([bg, i0, u0, width, vis, omega, ph])
    scale = np.array([abs(i0) + 1e-12, abs(i0) + 1e-12, span, span, 1.0, 1.0 / span, 1.0])
    try:
        sol = least_squares(resid, p0, x_scale=scale, method="trf", max_nfev=400)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not sol.success:
        return None
    jac = sol.jac
    try:
        cov = np.linalg.inv(jac.T @ jac)
    except np.linalg.LinAlgError:
        return None
    chi2 = float(sol.fun @ sol.fun)
    dof = max(prof.mean.size - 7, 1)
    cov *= max(1.0, chi2 / dof)
    bg_, i0_, u0_, w_, v_, _, _ = sol.x
    err = np.sqrt(np.maximum(np.diag(cov), 0.0))
    w_ = abs(w_)
    # Resolved only if a first zero falls inside the region.
    if not ((lo <= u0_ - w_ <= hi) or (lo <= u0_ + w_ <= hi)):
        return None
    return EnvelopeFit(u0=float(u0_), u0_err=float(err[2]), width=float(w_),
                       width_err=float(err[3]), visibility=float(v_),
                       visibility_err=float(err[4]), background=float(bg_), peak=float(i0_),
                       chi2=chi2, dof=dof)


def local_visibility(
    prof: Profile,
    *,
    omega: float,
    kappa: float,
    phi: float,
    sigma: np.ndarray,
    window_px: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Visibility in windows along the profile (fringe frequency and phase held fixed).

    In each window of ``window_px`` (a few periods) a linear least-squares fit of
    ``c0 + c1 g cos(psi) + c2 g sin(psi)`` gives V = hypot(c1, c2)/c0 and its
    uncertainty by first-order propagation of the fit covariance.

    Returns
    -------
    u, v, v_err : ndarray
        Window centres (px), visibilities and 1-sigma uncertainties.
    """
    lo, hi = prof.u_range
    n_win = int((hi - lo) // window_px)
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v + phi
    out_u, out_v, out_e = [], [], []
    for k in range(n_win):
        a, b = lo + k * window_px, lo + (k + 1) * window_px
        sel = (prof.u >= a) & (prof.u < b)
        if sel.sum() < 6:
            continue
        w = 1.0 / sigma[sel]
        des = np.vstack([np.ones(sel.sum()), g[sel] * np.cos(psi[sel]),
                         g[sel] * np.sin(psi[sel])]).T
        dw = des * w[:, None]
        coef, *_ = np.linalg.lstsq(dw, prof.mean[sel] * w, rcond=None)
        try:
            cov = np.linalg.inv(dw.T @ dw)
        except np.linalg.LinAlgError:
            continue
        c0, c1, c2 = coef
        if c0 <= 0:
            continue
        amp = float(np.hypot(c1, c2))
        vis = amp / c0
        grad = np.array([-vis / c0, c1 / (amp * c0 + 1e-300), c2 / (amp * c0 + 1e-300)])
        out_u.append(float(np.average(prof.u[sel], weights=prof.count[sel])))
        out_v.append(vis)
        out_e.append(float(np.sqrt(max(grad @ cov @ grad, 0.0))))
    return np.array(out_u), np.array(out_v), np.array(out_e)
