"""Compiled consistent cloud top: :func:`physics.cloud.consistent_top` as one numba loop per pixel.

The numpy function in ``physics/cloud.py`` is the reference (its docstring holds the method and
sources); this module computes the same χ² on the levels, the same rejections, the same fine
refinement and the same span, pixel by pixel over the levels, in float64, in parallel over
pixels. ``tests/test_cloud.py`` holds the two together (tops within 0.5 hPa, σ within 1 %,
χ² within 1e-6 relative, where no near-tie of two levels decides). The numpy path evaluates
every level of every pixel in long vector passes over memory; the loop stops at nothing but
keeps each pixel's values in registers, about ten times faster on scenes.

Used where ``physics.fused.enabled()`` (``CLOUDSIEVE_PHYSICS=numpy`` switches it off; a machine
where numba fails warns once and takes the numpy path, as for the clear-sky kernels).
"""
import math

import numpy as np

from . import fused

_INF = math.inf


if fused.numba is not None:
    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _misfit(s, dvec, s_obs, cov, beta, r, others, out, res, tc, g, h, cr):
        """χ² of the other channels at D = dvec (n_ch,); out[0] = χ², out[1] = ε_ref, out[2] = σ(ε_ref)."""
        var_clr_r = cov[r, r]
        d_r = dvec[r]
        eps_r = s[r] / d_r
        e = min(max(eps_r, 0.0), 1.0)
        s_eps_r = math.sqrt(s_obs[r] ** 2 + (1.0 - e) ** 2 * var_clr_r) / abs(d_r)
        out[1] = eps_r
        out[2] = s_eps_r
        trans = 1.0 - e
        t_hi = min(max(trans + s_eps_r, 0.0), 1.0)
        t_lo = min(max(trans - s_eps_r, 0.0), 1.0)
        span = t_hi - t_lo
        m = others.size
        if m == 0:
            out[0] = 0.0
            return
        # x**b as exp(b ln x) with the logarithms shared by the channels (x = 0 gives 0, as x**b)
        l_t = math.log(trans) if trans > 0 else -_INF
        l_hi = math.log(t_hi) if t_hi > 0 else -_INF
        l_lo = math.log(t_lo) if t_lo > 0 else -_INF
        for i in range(m):
            c = others[i]
            b = beta[c]
            d_c = dvec[c]
            if b == 1.0:  # grey channel
                t_c = trans
                secant = 1.0
            else:
                t_c = math.exp(b * l_t)
                secant = (math.exp(b * l_hi) - math.exp(b * l_lo)) / span if span > 0 else b
            res[i] = s[c] - (1.0 - t_c) * d_c
            tc[i] = t_c
            g[i] = secant * d_c * trans / d_r
            h[i] = -secant * d_c / d_r
        var_obs_r = s_obs[r] ** 2
        for i in range(m):
            ci = others[i]
            for j in range(m):
                cj = others[j]
                v = (tc[i] * tc[j] * cov[ci, cj] - tc[i] * g[j] * cov[ci, r] - g[i] * tc[j] * cov[r, cj]
                     + g[i] * g[j] * var_clr_r + h[i] * h[j] * var_obs_r)
                if i == j:
                    v += s_obs[ci] ** 2
                cr[i, j] = v
        if m == 1:
            chi2 = res[0] ** 2 / cr[0, 0]
        elif m == 2:
            det = cr[0, 0] * cr[1, 1] - cr[0, 1] * cr[0, 1]
            chi2 = (cr[1, 1] * res[0] ** 2 - 2.0 * cr[0, 1] * res[0] * res[1] + cr[0, 0] * res[1] ** 2) / det
        else:
            ok = True
            for i in range(m):
                if not math.isfinite(res[i]):
                    ok = False
                for j in range(m):
                    if not math.isfinite(cr[i, j]):
                        ok = False
            if ok:
                sol = np.linalg.solve(cr, res)
                chi2 = 0.0
                for i in range(m):
                    chi2 += res[i] * sol[i]
            else:
                chi2 = _INF
        if not (math.isfinite(chi2) and chi2 >= 0.0):
            chi2 = _INF
        out[0] = chi2

    @fused._njit(parallel=True, fastmath=False, error_model="numpy", nogil=True)
    def _consistent_top(s, d, lp, s_obs, cov, beta, allowed, r, others, noise_sigmas, steps,
                        p_out, sp_out, chi_out, usable_out):
        n, n_lev, n_ch = d.shape
        for i in fused.numba.prange(n):
            x = np.empty(n_lev)
            chi = np.empty(n_lev)
            tmp = np.empty(3)
            dv = np.empty(n_ch)
            m = others.size
            w_res = np.empty(max(m, 1))
            w_tc = np.empty(max(m, 1))
            w_g = np.empty(max(m, 1))
            w_h = np.empty(max(m, 1))
            w_cr = np.empty((max(m, 1), max(m, 1)))
            s_sig_r = math.sqrt(s_obs[i, r] ** 2 + cov[i, r, r])
            best = -1
            best_v = _INF
            for k in range(n_lev):
                x[k] = math.log(lp[i, k])
                # the rejections first (cheap): χ² only on the usable levels
                d_r = d[i, k, r]
                eps_r = s[i, r] / d_r
                e = min(max(eps_r, 0.0), 1.0)
                s_eps_r = math.sqrt(s_obs[i, r] ** 2 + (1.0 - e) ** 2 * cov[i, r, r]) / abs(d_r)
                ok = (allowed[i, k] and d_r < -noise_sigmas * s_sig_r and math.isfinite(eps_r)
                      and eps_r <= 1.0 + noise_sigmas * s_eps_r and eps_r >= -noise_sigmas * s_eps_r)
                usable_out[i, k] = ok
                v = _INF
                if ok:
                    _misfit(s[i], d[i, k], s_obs[i], cov[i], beta[i], r, others, tmp, w_res, w_tc, w_g, w_h, w_cr)
                    if math.isfinite(tmp[0]):
                        v = tmp[0]
                chi[k] = v
                if v < best_v:
                    best_v = v
                    best = k
            if best < 0:
                p_out[i] = math.nan
                sp_out[i] = _INF
                chi_out[i] = _INF
                continue
            k = best
            lo_k = k - 1 if k > 0 and math.isfinite(chi[k - 1]) else k
            hi_k = k + 1 if k < n_lev - 1 and math.isfinite(chi[k + 1]) else k
            mid = lo_k + 1 if lo_k < hi_k else lo_k
            xm = x[mid]
            x_lo, x_hi = x[lo_k], x[hi_k]
            bv = _INF
            bx = x[k]
            for j in range(steps):
                frac = j / (steps - 1)
                xt = x_lo + frac * (x_hi - x_lo)
                if xt <= xm and hi_k > mid:
                    k0, k1 = mid, hi_k
                else:
                    k0, k1 = lo_k, mid
                x0, x1 = x[k0], x[k1]
                w = (xt - x0) / (x1 - x0) if x1 != x0 else 0.0
                w = min(max(w, 0.0), 1.0)
                for c in range(n_ch):
                    dv[c] = d[i, k0, c] + (d[i, k1, c] - d[i, k0, c]) * w
                _misfit(s[i], dv, s_obs[i], cov[i], beta[i], r, others, tmp, w_res, w_tc, w_g, w_h, w_cr)
                v = tmp[0] if math.isfinite(tmp[0]) else _INF
                if v < bv:
                    bv = v
                    bx = xt
            if bv <= chi[k]:
                xs = bx
                cmin = bv
            else:
                xs = x[k]
                cmin = chi[k]
            chi_out[i] = cmin
            thr = cmin + max(1.0, cmin)
            lo = _INF
            hi = -_INF
            for q in range(n_lev):
                if usable_out[i, q] and chi[q] <= thr:
                    lo = min(lo, x[q])
                    hi = max(hi, x[q])
                if q < n_lev - 1 and usable_out[i, q] and usable_out[i, q + 1]:
                    f0 = chi[q] - thr
                    f1 = chi[q + 1] - thr
                    if math.isfinite(f0) and math.isfinite(f1) and ((f0 <= 0) != (f1 <= 0)):
                        w = min(max(f0 / (f0 - f1), 0.0), 1.0)
                        xc = x[q] + w * (x[q + 1] - x[q])
                        lo = min(lo, xc)
                        hi = max(hi, xc)
            if not (math.isfinite(lo) and math.isfinite(hi)):
                lo = 0.0
                hi = 0.0
            kk = min(max(k, 1), n_lev - 2)
            layer = 0.5 * abs(x[kk + 1] - x[kk - 1])
            sigma_x = max(0.5 * (hi - lo), 0.5 * layer)
            p = math.exp(xs)
            p_out[i] = p
            sp_out[i] = p * sigma_x


def consistent_top(s, d, lp, s_obs, cov, beta, allowed, reference, noise_sigmas, steps):
    """The compiled :func:`physics.cloud.consistent_top` on (n, ...) arrays (same returns)."""
    n, n_lev, n_ch = d.shape
    c = np.ascontiguousarray
    p = np.empty(n)
    sp = np.empty(n)
    chi = np.empty(n)
    usable = np.empty((n, n_lev), np.bool_)
    others = np.array([k for k in range(n_ch) if k != reference], np.int64)
    fused._run_kernel(_consistent_top, c(s, float), c(d, float), c(lp, float), c(s_obs, float), c(cov, float),
                      c(np.broadcast_to(beta, s.shape), float), c(allowed, np.bool_), int(reference), others,
                      float(noise_sigmas), int(steps), p, sp, chi, usable)
    return p, sp, chi, usable


def warm_up():
    """Compile the kernel (or load it from numba's cache) on one small pixel."""
    if not fused.enabled():
        return
    n_lev = 4
    d = -np.linspace(0.0, 30.0, n_lev)[None, :, None] * np.ones((1, 1, 3))
    consistent_top(np.full((1, 3), -5.0), d, np.linspace(1000.0, 100.0, n_lev)[None], np.full((1, 3), 0.1),
                   np.eye(3)[None] * 0.01, np.ones((1, 3)), np.ones((1, n_lev), bool), 1, 2.0, 9)
