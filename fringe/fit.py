"""Weighted nonlinear least-squares fit of a fringe model to a binned profile.

The model for a bin i in strip j, holding pixels with mean coordinates (u_i, v_i) and
within-bin variance var_i of u, is

    m_i = S_j(u_i) + g_i A_j(u_i) cos(omega u_i + kappa v_i + phi),
    g_i = exp(-omega^2 var_i / 2),

where S_j and A_j are slowly varying functions (the background-plus-envelope and the
fringe amplitude) expanded in an `EnvelopeBasis`: Legendre polynomials for up to four
terms, cubic B-splines with knots at least 2.5 periods apart beyond that (they follow
single-slit envelopes with zeros and side lobes without the wild swings of high-order
polynomials). omega = 2 pi / P along the projection normal, kappa is a small phase
gradient along the fringes (a rotation of the true normal against the projection
direction) and phi the phase at the reference point. g_i is the mean of the cosine over
the pixels of the bin (second order in the u spread, exact for a Gaussian spread).

The three nonlinear parameters are found by variable projection (the linear
coefficients are solved exactly for every trial); their covariance is the inverse of the
Schur complement of the full Gauss-Newton information matrix, strip by strip.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import legendre as _leg

from fringe.profile import Profile

__all__ = ["EnvelopeBasis", "FitResult", "fit_profile", "choose_basis", "basis_candidates",
           "fit_pooled_envelope", "EnvelopeFit", "fit_sinc2_envelope", "local_visibility"]


class EnvelopeBasis:
    """Slowly varying functions of u over a fixed range.

    Parameters
    ----------
    n : int
        Number of functions: Legendre polynomials P_0..P_{n-1} for n <= 4, otherwise
        cubic B-splines with n - 4 uniformly spaced interior knots.
    u_range : (float, float)
        Range of u covered by the data.

    References
    ----------
    .. [1] C. de Boor, A Practical Guide to Splines, Springer (1978), ch. IX.
    """

    def __init__(self, n: int, u_range: tuple[float, float]):
        self.n = int(max(1, n))
        self.lo, self.hi = float(u_range[0]), float(u_range[1])
        self.kind = "legendre" if self.n <= 4 else "bspline"
        if self.kind == "bspline":
            inner = np.linspace(self.lo, self.hi, self.n - 2)
            self.knots = np.concatenate([[self.lo] * 3, inner, [self.hi] * 3])

    @property
    def spacing(self) -> float:
        """Knot spacing (px) of the B-splines; the full range for polynomials."""
        if self.kind == "legendre":
            return self.hi - self.lo
        return (self.hi - self.lo) / (self.n - 3)

    def matrix(self, u: np.ndarray) -> np.ndarray:
        """Values of every function at ``u``, shape (len(u), n)."""
        u = np.asarray(u, dtype=np.float64)
        if self.kind == "legendre":
            xi = (u - 0.5 * (self.lo + self.hi)) / max(0.5 * (self.hi - self.lo), 1e-9)
            return _leg.legvander(xi, self.n - 1)
        from scipy.interpolate import BSpline

        uc = np.clip(u, self.lo, self.hi)
        return BSpline.design_matrix(uc, self.knots, 3).toarray()

    def describe(self) -> str:
        if self.kind == "legendre":
            return f"Legendre polynomials, order {self.n - 1}"
        return f"cubic B-splines, {self.n} functions, knots every {self.spacing:.1f} px"


def basis_candidates(u_range: tuple[float, float], period: float) -> list[int]:
    """Numbers of envelope functions to try: knots never closer than 2.5 periods."""
    span = max(u_range[1] - u_range[0], 1e-9)
    n_max = 4 + int(np.floor(span / (2.5 * period))) - 1
    base = [1, 2, 3, 4, 6, 8, 11, 15, 20, 27, 36, 48, 64]
    out = [n for n in base if n <= 4 or n <= n_max]
    return out


@dataclass
class FitResult:
    """Parameters, covariance and statistics of the fringe model.

    Attributes
    ----------
    omega, kappa, phi : float
        Nonlinear parameters (rad/px, rad/px, rad).
    a, b : (J, n) ndarray
        Coefficients of S_j and A_j in each strip (zero for functions a strip does not
        support).
    cov : (3, 3) ndarray
        Covariance of (omega, kappa, phi), marginal over the linear coefficients, scaled
        by max(1, chi²/dof).
    chi2, dof : float, int
        Weighted residual sum of squares and degrees of freedom.
    basis : EnvelopeBasis
    """

    omega: float
    kappa: float
    phi: float
    a: np.ndarray
    b: np.ndarray
    cov: np.ndarray
    chi2: float
    dof: int
    basis: EnvelopeBasis
    kappa_free: bool
    cov_scale: float = 1.0
    warnings: list[str] = field(default_factory=list)

    @property
    def chi2_red(self) -> float:
        return self.chi2 / max(self.dof, 1)

    @property
    def n_basis(self) -> int:
        return self.basis.n

    def model(self, u: np.ndarray, v: np.ndarray, strip: np.ndarray,
              u_var: np.ndarray | None = None) -> np.ndarray:
        """Evaluate the model at coordinates (pixels when ``u_var`` is None)."""
        mat = self.basis.matrix(u)
        s = np.einsum("ik,ik->i", mat, self.a[strip])
        amp = np.einsum("ik,ik->i", mat, self.b[strip])
        psi = self.omega * u + self.kappa * v + self.phi
        g = 1.0 if u_var is None else np.exp(-0.5 * self.omega**2 * u_var)
        return s + g * amp * np.cos(psi)


def _strip_slices(prof: Profile, n_strips: int) -> list[slice]:
    """Bins are stored strip by strip (see `project`): one slice per strip."""
    bounds = np.searchsorted(prof.strip, np.arange(n_strips + 1))
    return [slice(int(bounds[j]), int(bounds[j + 1])) for j in range(n_strips)]


def _active_columns(prof: Profile, basis: EnvelopeBasis, mat: np.ndarray) -> np.ndarray:
    """Which basis functions each strip can support (J, n) bool.

    Legendre: strips covering only part of the u range (corners of a rotated region)
    get a proportionally lower order. B-splines: functions with little support among
    the strip's bins are left out.
    """
    n_strips = prof.n_strips
    active = np.zeros((n_strips, basis.n), dtype=bool)
    span = max(basis.hi - basis.lo, 1e-9)
    for j, sel in enumerate(_strip_slices(prof, n_strips)):
        if sel.stop <= sel.start:
            continue
        if basis.kind == "legendre":
            cover = (prof.u[sel.stop - 1] - prof.u[sel.start] + prof.bin_width) / span
            k = int(np.clip(np.floor((basis.n - 1) * cover + 0.25), 0, basis.n - 1))
            active[j, :k + 1] = True
        else:
            colsum = mat[sel].sum(axis=0)
            active[j] = colsum >= 0.2 * colsum.max()
    return active


def _lsq(design: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Linear least squares by the normal equations (well-conditioned bases), falling
    back to an SVD solution when they are singular."""
    from scipy.linalg import LinAlgError as _SciErr
    from scipy.linalg import cho_factor, cho_solve

    gram = design.T @ design
    rhs = design.T @ target
    try:
        return cho_solve(cho_factor(gram, check_finite=False), rhs, check_finite=False)
    except (np.linalg.LinAlgError, _SciErr, ValueError):
        return np.linalg.lstsq(design, target, rcond=None)[0]


def _solve_linear(prof, weights, mat, g, psi, active):
    """Per strip, the weighted linear least-squares solution for (a_j, b_j)."""
    n_strips, n = active.shape
    a = np.zeros((n_strips, n))
    b = np.zeros((n_strips, n))
    resid = np.empty_like(prof.mean)
    cosp = g * np.cos(psi)
    for j, sel in enumerate(_strip_slices(prof, n_strips)):
        if sel.stop <= sel.start:
            continue
        cols = active[j]
        w = weights[sel]
        bs = mat[sel][:, cols]
        design = np.hstack([bs, bs * cosp[sel, None]]) * w[:, None]
        target = prof.mean[sel] * w
        coef = _lsq(design, target)
        k = int(cols.sum())
        a[j, cols], b[j, cols] = coef[:k], coef[k:]
        resid[sel] = target - design @ coef
    return a, b, resid


def _initial_phase(prof, weights, mat, active, omega, kappa):
    """Phase (and along-fringe phase gradient) from a linear fit with cos and sin terms."""
    n_strips = prof.n_strips
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v
    z_strip = np.zeros(n_strips, dtype=complex)
    v_strip = np.zeros(n_strips)
    n_tot = np.zeros(n_strips)
    for j, sel in enumerate(_strip_slices(prof, n_strips)):
        cols = active[j]
        k = int(cols.sum())
        if sel.stop - sel.start < 3 * k + 2:
            continue
        w = weights[sel]
        c = g[sel] * np.cos(psi[sel])
        s = g[sel] * np.sin(psi[sel])
        bj = mat[sel][:, cols]
        design = np.hstack([bj, bj * c[:, None], bj * s[:, None]]) * w[:, None]
        coef = _lsq(design, prof.mean[sel] * w)
        cc, ss = coef[k:2 * k], coef[2 * k:]
        # A cos(psi + phi) = A cos(phi) cos(psi) - A sin(phi) sin(psi)
        zc = (bj @ cc) - 1j * (bj @ ss)
        z_strip[j] = np.sum(zc * prof.count[sel])
        v_strip[j] = np.average(prof.v[sel], weights=prof.count[sel])
        n_tot[j] = prof.count[sel].sum()
    good = n_tot > 0
    phi0 = float(np.angle(z_strip[good].sum())) if good.any() else 0.0
    dkappa = 0.0
    if good.sum() >= 2:
        ph = np.unwrap(np.angle(z_strip[good] * np.exp(-1j * phi0)))
        vv = v_strip[good]
        if np.ptp(vv) > 0:
            dkappa = float(np.polyfit(vv, ph, 1, w=np.sqrt(np.abs(z_strip[good])))[0])
    return phi0, dkappa


def fit_profile(
    prof: Profile,
    *,
    omega0: float,
    n_basis: int = 3,
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
    n_basis : int
        Number of envelope functions (see `EnvelopeBasis`).
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
    Variable projection: for every trial (omega, kappa, phi) the envelope coefficients
    are the exact weighted linear least-squares solution, and the nonlinear parameters
    are iterated by the trust-region reflective method with a finite-difference Jacobian
    of the projected residual. The covariance of (omega, kappa, phi) is the inverse of
    the Schur complement H = sum_j (J_t'J_t - J_t'J_l (J_l'J_l)^-1 J_l'J_t) of the
    weighted Gauss-Newton information matrix (t: nonlinear, l: linear parameters of
    strip j), multiplied by max(1, chi²/dof) (the bins may be noisier than the noise
    model says, e.g. for correlated noise).

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
    basis = EnvelopeBasis(n_basis, prof.u_range)
    mat = basis.matrix(prof.u)
    active = _active_columns(prof, basis, mat)
    if sigma is None:
        if prof.var_mean is not None:
            sigma = np.sqrt(np.maximum(prof.var_mean, 1e-300))
        else:
            sigma = 1.0 / np.sqrt(prof.count)
    weights = 1.0 / sigma

    if phi0 is None:
        phi0, dk = _initial_phase(prof, weights, mat, active, omega0, kappa0)
        if kappa_free:
            kappa0 = kappa0 + dk

    def unpack(theta):
        if kappa_free:
            return theta[0], theta[1], theta[2]
        return theta[0], 0.0, theta[1]

    def design(om, ka, ph):
        g = np.exp(-0.5 * om**2 * prof.u_var)
        psi = om * prof.u + ka * prof.v + ph
        return g, psi

    def resid(theta):
        om, ka, ph = unpack(theta)
        g, psi = design(om, ka, ph)
        return _solve_linear(prof, weights, mat, g, psi, active)[2]

    theta0 = np.array([omega0, kappa0, phi0] if kappa_free else [omega0, phi0])
    span = max(prof.u_range[1] - prof.u_range[0], 1.0)
    scale = np.array([1.0 / span, 1.0 / span, 1.0] if kappa_free else [1.0 / span, 1.0])
    sol = least_squares(resid, theta0, x_scale=scale, method="trf", xtol=1e-12, ftol=1e-12,
                        gtol=1e-12, max_nfev=200)
    om, ka, ph = unpack(sol.x)
    g, psi = design(om, ka, ph)
    a, b, r = _solve_linear(prof, weights, mat, g, psi, active)

    # Make the amplitude positive where the data are (the sign belongs to the phase).
    amp_bins = np.einsum("ik,ik->i", mat, b[prof.strip])
    if np.sum(amp_bins * prof.count) < 0:
        b = -b
        ph = ph + np.pi
        psi = psi + np.pi
        amp_bins = -amp_bins
    ph = float(np.angle(np.exp(1j * ph)))

    # Covariance of (omega, kappa, phi): Schur complement strip by strip.
    sinp, cosp = np.sin(psi), np.cos(psi)
    jt = np.empty((prof.mean.size, 3))
    jt[:, 0] = -g * amp_bins * sinp * prof.u - om * prof.u_var * g * amp_bins * cosp
    jt[:, 1] = -g * amp_bins * sinp * prof.v if kappa_free else 0.0
    jt[:, 2] = -g * amp_bins * sinp
    jt *= weights[:, None]
    info = np.zeros((3, 3))
    n_lin = 0
    for j, sel in enumerate(_strip_slices(prof, n_strips)):
        if sel.stop <= sel.start:
            continue
        cols = active[j]
        bs = mat[sel][:, cols]
        jl = np.hstack([bs, bs * (g[sel] * cosp[sel])[:, None]]) * weights[sel, None]
        n_lin += jl.shape[1]
        tj = jt[sel]
        cross = tj.T @ jl
        gram = jl.T @ jl
        try:
            proj = cross @ np.linalg.solve(gram, cross.T)
        except np.linalg.LinAlgError:
            proj = cross @ np.linalg.pinv(gram) @ cross.T
        info += tj.T @ tj - proj
    if not kappa_free:
        info[1, :] = 0.0
        info[:, 1] = 0.0
        info[1, 1] = 1.0
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(info)
    if not kappa_free:
        cov[1, :] = 0.0
        cov[:, 1] = 0.0
    chi2 = float(r @ r)
    dof = int(prof.mean.size - n_lin - (3 if kappa_free else 2))
    scale_c = max(1.0, chi2 / max(dof, 1))
    return FitResult(omega=float(om), kappa=float(ka), phi=ph, a=a, b=b, cov=cov * scale_c,
                     chi2=chi2, dof=dof, basis=basis, kappa_free=bool(kappa_free),
                     cov_scale=scale_c)


def choose_basis(
    prof: Profile,
    *,
    omega: float,
    kappa: float,
    phi: float,
    sigma: np.ndarray,
    candidates: list[int],
) -> int:
    """Choose the number of envelope functions by the Bayesian information criterion.

    Each candidate is fitted with the fringe frequency and phase held at
    (omega, kappa, phi) and only the linear coefficients solved (fast); the smallest
    chi² + p ln(M) wins (p parameters, M bins). The search stops after three candidates
    in a row fail to improve.

    References
    ----------
    .. [1] G. Schwarz, "Estimating the dimension of a model", Ann. Stat. 6(2), 461-464
       (1978). doi:10.1214/aos/1176344136
    """
    best = None
    m = prof.mean.size
    worse = 0
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v + phi
    for n in candidates:
        basis = EnvelopeBasis(n, prof.u_range)
        mat = basis.matrix(prof.u)
        active = _active_columns(prof, basis, mat)
        r = _solve_linear(prof, 1.0 / sigma, mat, g, psi, active)[2]
        p = 3 + 2 * int(active.sum())
        bic = float(r @ r) + p * np.log(m)
        if best is None or bic < best[0]:
            best = (bic, n)
            worse = 0
        else:
            worse += 1
            if worse >= 3:
                break
    return best[1]


def fit_pooled_envelope(prof: Profile, *, omega: float, kappa: float, phi: float,
                        n_basis: int, sigma: np.ndarray
                        ) -> tuple[EnvelopeBasis, np.ndarray, np.ndarray, np.ndarray]:
    """Background and amplitude series of a single-strip profile with the fringe held.

    Returns ``(basis, a, b, cov)``: the coefficients of S(u) and A(u) and their joint
    covariance (scaled by max(1, chi²/dof)).
    """
    basis = EnvelopeBasis(n_basis, prof.u_range)
    mat = basis.matrix(prof.u)
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    psi = omega * prof.u + kappa * prof.v + phi
    w = 1.0 / sigma
    design = np.hstack([mat, mat * (g * np.cos(psi))[:, None]]) * w[:, None]
    target = prof.mean * w
    coef = _lsq(design, target)
    r = target - design @ coef
    dof = max(r.size - coef.size, 1)
    gram = design.T @ design
    try:
        cov = np.linalg.inv(gram)
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(gram)
    cov *= max(1.0, float(r @ r) / dof)
    n = basis.n
    return basis, coef[:n], coef[n:], cov


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
    background: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Visibility in windows along the profile (fringe frequency and phase held fixed).

    In each window of ``window_px`` (a few periods) a linear least-squares fit of
    ``c0 + c1 g cos(psi) + c2 g sin(psi)`` gives V = hypot(c1, c2)/(c0 - background) and
    its uncertainty by first-order propagation of the fit covariance. ``background`` is
    a level under the two-beam pattern (camera offset, ambient light) to be removed.

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
        c0 = c0 - background
        if c0 <= 0:
            continue
        amp = float(np.hypot(c1, c2))
        vis = amp / c0
        grad = np.array([-vis / c0, c1 / (amp * c0 + 1e-300), c2 / (amp * c0 + 1e-300)])
        out_u.append(float(np.average(prof.u[sel], weights=prof.count[sel])))
        out_v.append(vis)
        out_e.append(float(np.sqrt(max(grad @ cov @ grad, 0.0))))
    return np.array(out_u), np.array(out_v), np.array(out_e)
