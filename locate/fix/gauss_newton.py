"""Vectorised Gauss-Newton for many stationary-source problems (used by :mod:`locate.fix.batched`).

Each of S problems has its own mics (the first is the reference), arrival times relative to it
and their covariance; the residuals are whitened by each problem's Cholesky factor.  The start
is the spherical-interpolation linear solution (first stage of Chan & Ho 1994, IEEE Trans. SP
42(8)); the refinement is Levenberg-Marquardt on the whitened residuals (Foy 1976, IEEE Trans.
AES 12(2)) with every problem's own damping, as :func:`locate.fix.solver._refine`, then two undamped
Gauss-Newton steps that put each solution on its minimum to rounding.
"""

from __future__ import annotations

import numpy as np

from locate.physics.air import travel_time_gradient, travel_time_s

__all__ = ["Model", "solve", "subsets", "levenberg_marquardt", "closed_form"]


class Model:
    """Arrival-time differences to each set's first mic, whitened by the set's covariance.

    ``mics`` (S, M, 3) are the mics of every set (the first is the reference), ``z`` (S, M-1)
    the measured arrival times relative to it and ``cov`` (S, M-1, M-1) their covariance.
    """

    def __init__(self, mics, z, cov, c, wind, dims, source_z_m):
        self.mics, self.z, self.c, self.wind = mics, z, c, wind
        self.dims, self.source_z_m = dims, source_z_m
        cz = 0.5 * (cov + np.swapaxes(cov, 1, 2))
        self.winv = np.linalg.inv(np.linalg.cholesky(cz + np.eye(cz.shape[-1]) * 1e-30))

    def point(self, x):
        if self.dims == 2:
            return np.concatenate([x, np.full(x.shape[:-1] + (1,), self.source_z_m)], -1)
        return x

    def plain_residual(self, x, sel=slice(None)):
        t = travel_time_s(self.point(x)[:, None, :], self.mics[sel], self.c, self.wind)
        return self.z[sel] - (t[:, 1:] - t[:, :1])

    def residual(self, x, sel=slice(None)):
        return (self.winv[sel] @ self.plain_residual(x, sel)[..., None])[..., 0]

    def jacobian(self, x, sel=slice(None)):
        g = travel_time_gradient(self.point(x)[:, None, :], self.mics[sel], self.c, self.wind)
        jac = (g[:, 1:] - g[:, :1])[..., : self.dims]
        return self.winv[sel] @ jac


def closed_form(mics, z, c, dims, source_z_m):
    """Spherical-interpolation start of every set (still air, its first mic as origin)."""
    m0 = mics[:, 0]
    mi = mics[:, 1:] - m0[:, None]
    r = c * z  # (S, M-1) range differences
    if dims == 2:
        zrel = source_z_m - m0[:, 2]
        a = np.concatenate([-2 * mi[..., :2], -2 * r[..., None]], axis=-1)
        b = r**2 - np.sum(mi**2, axis=-1) + 2 * mi[..., 2] * zrel[:, None]
    else:
        a = np.concatenate([-2 * mi, -2 * r[..., None]], axis=-1)
        b = r**2 - np.sum(mi**2, axis=-1)
    ata = np.swapaxes(a, 1, 2) @ a
    atb = (np.swapaxes(a, 1, 2) @ b[..., None])[..., 0]
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(ata).all(axis=(1, 2)) & (np.abs(np.linalg.det(ata)) > 0)
    sol = np.full(atb.shape, np.nan)
    if ok.any():
        sol[ok] = np.linalg.solve(ata[ok], atb[ok][..., None])[..., 0]
    return sol[:, :dims] + m0[:, :dims]


def solve(mics, z, cov, c, wind, dims, source_z_m):
    """Closed-form start and LM for every set: (model, x, chi2, converged, bad_start)."""
    model = Model(mics, z, cov, c, wind, dims, source_z_m)
    x0 = closed_form(mics, z, c, dims, source_z_m)
    bad = ~np.isfinite(x0).all(axis=1)
    x0[bad] = mics[bad].mean(axis=1)[:, :dims]
    x, chi2, conv = levenberg_marquardt(model, x0)
    return model, x, chi2, conv, bad


def subsets(tau, cov, used):
    """Arrival-time problem of every set on its mics ``used`` (S, M): z (S, M-1), cov."""
    rows = np.arange(len(used))[:, None]
    ref, rest = used[:, :1], used[:, 1:]
    z = tau[rows, rest] - tau[rows, ref]
    c_rr = cov[rows[..., None], rest[:, :, None], rest[:, None, :]]
    c_r0 = cov[rows, rest, ref]  # (S, M-1)
    c_00 = cov[rows, ref, ref]  # (S, 1)
    cz = c_rr - c_r0[:, :, None] - c_r0[:, None, :] + c_00[:, :, None]
    return z, cz


def levenberg_marquardt(model, x, max_iter=60):
    """Every set's own Levenberg-Marquardt run, as :func:`locate.fix.solver._refine`."""
    n_w = x.shape[0]
    r = model.residual(x)
    chi2 = np.sum(r**2, axis=-1)
    lam = np.full(n_w, 1e-3)
    active = np.isfinite(chi2)
    converged = np.zeros(n_w, bool)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        jw = model.jacobian(x[idx], idx)
        jtj = np.swapaxes(jw, 1, 2) @ jw
        g = np.einsum("wpk,wp->wk", jw, r[idx])
        scale2 = np.clip(np.diagonal(jtj, axis1=1, axis2=2), 1e-30, None)
        improved = np.zeros(idx.size, bool)
        xn, rn, chi2n = x[idx].copy(), r[idx].copy(), chi2[idx].copy()
        trying = np.ones(idx.size, bool)
        for _ in range(30):  # raise the damping of the sets that went uphill
            t = np.flatnonzero(trying)
            if t.size == 0:
                break
            a = jtj[t] + lam[idx[t], None, None] * (np.eye(scale2.shape[1]) * scale2[t, None])
            step = np.linalg.solve(a, g[t][..., None])[..., 0]
            x_try = x[idx[t]] + step
            r_try = model.residual(x_try, idx[t])
            c_try = np.sum(r_try**2, axis=-1)
            ok = np.isfinite(c_try) & (c_try <= chi2[idx[t]])
            good = t[ok]
            xn[good], rn[good], chi2n[good] = x_try[ok], r_try[ok], c_try[ok]
            improved[good] = True
            trying[good] = False
            lam[idx[t[~ok]]] *= 10.0
        stuck = idx[~improved]  # no downhill step: at a minimum to numerical precision
        converged[stuck] = True
        active[stuck] = False
        up = np.flatnonzero(improved)
        iu = idx[up]
        small = (np.linalg.norm(xn[up] - x[iu], axis=1)
                 <= 1e-9 * (1.0 + np.linalg.norm(x[iu], axis=1)))
        dchi = chi2[iu] - chi2n[up]
        x[iu], r[iu], chi2[iu] = xn[up], rn[up], chi2n[up]
        lam[iu] = np.maximum(lam[iu] / 10.0, 1e-12)
        done = small | (dchi <= 1e-10 * (1.0 + chi2[iu]))
        converged[iu[done]] = True
        active[iu[done]] = False
    for _ in range(2):  # undamped polish: the exact minimum to rounding
        jw = model.jacobian(x)
        jtj = np.swapaxes(jw, 1, 2) @ jw
        g = np.einsum("wpk,wp->wk", jw, r)
        ok = np.isfinite(g).all(axis=1) & (np.abs(np.linalg.det(jtj)) > 0)
        if ok.any():
            step = np.linalg.solve(jtj[ok], g[ok][..., None])[..., 0]
            xt = x[ok] + step
            rt = model.residual(xt, np.flatnonzero(ok))
            ct = np.sum(rt**2, axis=-1)
            better = ct <= chi2[ok]
            sel = np.flatnonzero(ok)[better]
            x[sel], r[sel], chi2[sel] = xt[better], rt[better], ct[better]
    return x, chi2, converged
