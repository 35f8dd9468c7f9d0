"""Compiled single-layer cloud inversion: physics.cloud's cloud-top search and inversion as numba loops.

The numpy functions in ``physics/cloud.py`` are the reference (float64; their docstrings hold
the method and sources). This module computes the same quantities pixel by pixel in parallel
over pixels:

- :func:`consistent_top`: the χ² search of :func:`physics.cloud.consistent_top` (levels,
  rejections, fine refinement, span);
- :func:`cloud_tops`: :func:`physics.cloud.cloud_tops` — opaque top, rejections and ln p grid
  once per pixel, then one χ² search per set of absorption ratios (the phases tried), the
  fallbacks to an assumed or opaque top, and the air temperature at each top;
- :func:`cloud_at_top`: :func:`physics.cloud.cloud_at_top` — emissivities, optical depth and its
  uncertainty (including the top's), status.

Storage: the per-level inputs (pressure, temperature, opaque-level radiances: the largest) are
read as float32 (what the scene's simulation keeps), the per-pixel ones as float64; the
arithmetic inside a pixel is float64 (the
χ² of strongly correlated channels needs it), so the results equal the reference's to rounding.
``tests/test_cloud.py`` holds the two paths together on synthetic clouds and on the sample
scenes. Why it is fast: each pixel's values stay in registers instead of long vector passes
over memory; the phases share the per-level reference-channel terms; the two-other-channel
case (the usual three inversion channels) passes scalars, not arrays, to its inner function
(a numba call with a dozen array arguments costs more than the χ² itself).

Used where ``physics.fused.enabled()`` (``CLOUDSIEVE_PHYSICS=numpy`` switches it off; a machine
where numba fails warns once and takes the numpy path, as for the clear-sky kernels).
"""
import math

import numpy as np

from . import fused

_INF = math.inf
#: pixels per work-array allocation in the kernels' parallel loops
_TILE = 128


if fused.numba is not None:
    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _ref_terms(s_r, d_r, var_obs_r, var_clr_r, need_logs, terms, k):
        """The reference channel's part of the misfit at D_ref = d_r: terms[:] = (ε_ref, σ(ε_ref),
        t = 1 − ε_ref clipped to [0, 1], ln t, ln t_hi, ln t_lo, t_hi − t_lo) with t_hi, t_lo = t ± σ
        clipped (the logarithms only where a non-grey channel needs them: x**b as exp(b ln x),
        x = 0 giving 0 as x**b does)."""
        eps_r = s_r / d_r
        e = min(max(eps_r, 0.0), 1.0)
        s_eps_r = math.sqrt(var_obs_r + (1.0 - e) ** 2 * var_clr_r) / abs(d_r)
        trans = 1.0 - e
        t_hi = min(max(trans + s_eps_r, 0.0), 1.0)
        t_lo = min(max(trans - s_eps_r, 0.0), 1.0)
        terms[k, 0] = eps_r
        terms[k, 1] = s_eps_r
        terms[k, 2] = trans
        terms[k, 6] = t_hi - t_lo
        if need_logs:
            terms[k, 3] = math.log(trans) if trans > 0 else -_INF
            terms[k, 4] = math.log(t_hi) if t_hi > 0 else -_INF
            terms[k, 5] = math.log(t_lo) if t_lo > 0 else -_INF

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _chi2_two(s_a, s_b, d_a, d_b, d_r, beta_a, beta_b, trans, span, l_t, l_hi, l_lo, c_aa, c_bb, c_ab, c_ar, c_ra,
                  c_br, c_rb, var_clr_r, var_obs_r, var_obs_a, var_obs_b):
        """:func:`_chi2` for two other channels a, b (the usual three inversion channels), on scalars:
        a call with arrays costs more than this arithmetic."""
        if beta_a == 1.0:
            t_a, sec_a = trans, 1.0
        else:
            t_a = math.exp(beta_a * l_t)
            sec_a = (math.exp(beta_a * l_hi) - math.exp(beta_a * l_lo)) / span if span > 0 else beta_a
        if beta_b == 1.0:
            t_b, sec_b = trans, 1.0
        else:
            t_b = math.exp(beta_b * l_t)
            sec_b = (math.exp(beta_b * l_hi) - math.exp(beta_b * l_lo)) / span if span > 0 else beta_b
        r_a = s_a - (1.0 - t_a) * d_a
        r_b = s_b - (1.0 - t_b) * d_b
        g_a = sec_a * d_a * trans / d_r
        g_b = sec_b * d_b * trans / d_r
        h_a = -sec_a * d_a / d_r
        h_b = -sec_b * d_b / d_r
        v_aa = (t_a * t_a * c_aa - t_a * g_a * c_ar - g_a * t_a * c_ra + g_a * g_a * var_clr_r
                + h_a * h_a * var_obs_r) + var_obs_a
        v_bb = (t_b * t_b * c_bb - t_b * g_b * c_br - g_b * t_b * c_rb + g_b * g_b * var_clr_r
                + h_b * h_b * var_obs_r) + var_obs_b
        v_ab = (t_a * t_b * c_ab - t_a * g_b * c_ar - g_a * t_b * c_rb + g_a * g_b * var_clr_r
                + h_a * h_b * var_obs_r)
        det = v_aa * v_bb - v_ab * v_ab
        chi2 = (v_bb * r_a ** 2 - 2.0 * v_ab * r_a * r_b + v_aa * r_b ** 2) / det
        if not (math.isfinite(chi2) and chi2 >= 0.0):
            chi2 = _INF
        return chi2

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _chi2(s, d, k, s_obs, cov, beta, r, others, terms, res, tc, g, h, cr):
        """χ² of the other channels at D = d[k] (row k of (n, n_ch)), given the reference terms of
        :func:`_ref_terms` in row k of ``terms`` (inf where not finite or negative); any number of
        other channels (a linear solve for more than two; :func:`_chi2_two` is the fast case)."""
        m = others.size
        if m == 0:
            return 0.0
        var_clr_r = cov[r, r]
        var_obs_r = s_obs[r] ** 2
        d_r = d[k, r]
        trans, span = terms[k, 2], terms[k, 6]
        l_t, l_hi, l_lo = terms[k, 3], terms[k, 4], terms[k, 5]
        for i in range(m):
            c = others[i]
            b = beta[c]
            d_c = d[k, c]
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
        return chi2

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _clip(v, lo, hi):
        """np.clip of one value (NaN passes through; lo > hi gives hi, as np.clip)."""
        if v < lo:
            v = lo
        if v > hi:
            v = hi
        return v

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _needs_logs(beta, others):
        """True where some other channel is not grey (β ≠ 1)."""
        for i in range(others.size):
            if beta[others[i]] != 1.0:
                return True
        return False

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _level_pass(s, d, lp, s_obs, cov, allowed, r, noise_sigmas, need_logs, usable, x, terms):
        """The rejections of consistent_top on one pixel's levels (phase-independent: the reference
        channel alone decides), cheapest test first. Writes usable (n_lev,), and on the usable levels
        x = ln p and the reference terms (:func:`_ref_terms`), which every phase's search shares."""
        var_obs_r = s_obs[r] ** 2
        var_clr_r = cov[r, r]
        limit = -noise_sigmas * math.sqrt(var_obs_r + var_clr_r)
        for k in range(d.shape[0]):
            ok = False
            if allowed[k] and d[k, r] < limit:
                _ref_terms(s[r], d[k, r], var_obs_r, var_clr_r, need_logs, terms, k)
                eps_r, s_eps_r = terms[k, 0], terms[k, 1]
                ok = (math.isfinite(eps_r) and eps_r <= 1.0 + noise_sigmas * s_eps_r
                      and eps_r >= -noise_sigmas * s_eps_r)
                if ok:
                    x[k] = math.log(lp[k])
            usable[k] = ok

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _search(s, d, lp, x, s_obs, cov, beta, usable, terms, r, others, steps, need_logs, chi, dv, t_terms,
                w_res, w_tc, w_g, w_h, w_cr, result):
        """χ² search of one pixel over its usable levels, refinement and span (consistent_top's notes);
        result[:] = (pressure, its σ, χ²_min) [hPa, hPa, 1] (NaN, inf, inf where no level is usable)."""
        n_lev, n_ch = d.shape
        var_obs_r = s_obs[r] ** 2
        var_clr_r = cov[r, r]
        two = others.size == 2
        a = others[0] if two else 0
        b = others[1] if two else 0
        s_a, s_b, beta_a, beta_b = s[a], s[b], beta[a], beta[b]
        c_aa, c_bb, c_ab = cov[a, a], cov[b, b], cov[a, b]
        c_ar, c_ra, c_br, c_rb = cov[a, r], cov[r, a], cov[b, r], cov[r, b]
        v_a, v_b = s_obs[a] ** 2, s_obs[b] ** 2
        best = -1
        best_v = _INF
        for k in range(n_lev):
            v = _INF
            if usable[k]:
                if two:
                    v = _chi2_two(s_a, s_b, d[k, a], d[k, b], d[k, r], beta_a, beta_b, terms[k, 2], terms[k, 6],
                                  terms[k, 3], terms[k, 4], terms[k, 5], c_aa, c_bb, c_ab, c_ar, c_ra, c_br, c_rb,
                                  var_clr_r, var_obs_r, v_a, v_b)
                else:
                    v = _chi2(s, d, k, s_obs, cov, beta, r, others, terms, w_res, w_tc, w_g, w_h, w_cr)
            chi[k] = v
            if v < best_v:
                best_v = v
                best = k
        if best < 0:
            result[0] = math.nan
            result[1] = _INF
            result[2] = _INF
            return
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
                dv[0, c] = d[k0, c] + (d[k1, c] - d[k0, c]) * w
            _ref_terms(s[r], dv[0, r], var_obs_r, var_clr_r, need_logs, t_terms, 0)
            if two:
                v = _chi2_two(s_a, s_b, dv[0, a], dv[0, b], dv[0, r], beta_a, beta_b, t_terms[0, 2], t_terms[0, 6],
                              t_terms[0, 3], t_terms[0, 4], t_terms[0, 5], c_aa, c_bb, c_ab, c_ar, c_ra, c_br, c_rb,
                              var_clr_r, var_obs_r, v_a, v_b)
            else:
                v = _chi2(s, dv, 0, s_obs, cov, beta, r, others, t_terms, w_res, w_tc, w_g, w_h, w_cr)
            if v < bv:
                bv = v
                bx = xt
        if bv <= chi[k]:
            xs = bx
            cmin = bv
        else:
            xs = x[k]
            cmin = chi[k]
        thr = cmin + max(1.0, cmin)
        lo = _INF
        hi = -_INF
        for q in range(n_lev):
            if usable[q] and chi[q] <= thr:
                lo = min(lo, x[q])
                hi = max(hi, x[q])
            if q < n_lev - 1 and usable[q] and usable[q + 1]:
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
        layer = 0.5 * abs(math.log(lp[kk + 1]) - math.log(lp[kk - 1]))
        sigma_x = max(0.5 * (hi - lo), 0.5 * layer)
        p = math.exp(xs)
        result[0] = p
        result[1] = p * sigma_x
        result[2] = cmin

    @fused._njit(parallel=True, fastmath=False, error_model="numpy", nogil=True)
    def _consistent_top(s, d, lp, s_obs, cov, beta, allowed, r, others, noise_sigmas, steps,
                        p_out, sp_out, chi_out, usable_out):
        n, n_lev, n_ch = d.shape
        m = max(others.size, 1)
        for tile in fused.numba.prange((n + _TILE - 1) // _TILE):
            x = np.empty(n_lev)
            terms = np.empty((n_lev, 7))
            chi = np.empty(n_lev)
            dv = np.empty((1, n_ch))
            t_terms = np.empty((1, 7))
            w_res, w_tc, w_g, w_h, w_cr = np.empty(m), np.empty(m), np.empty(m), np.empty(m), np.empty((m, m))
            result = np.empty(3)
            for i in range(tile * _TILE, min(n, (tile + 1) * _TILE)):
                need_logs = _needs_logs(beta[i], others)
                _level_pass(s[i], d[i], lp[i], s_obs[i], cov[i], allowed[i], r, noise_sigmas, need_logs,
                            usable_out[i], x, terms)
                _search(s[i], d[i], lp[i], x, s_obs[i], cov[i], beta[i], usable_out[i], terms, r, others, steps,
                        need_logs, chi, dv, t_terms, w_res, w_tc, w_g, w_h, w_cr, result)
                p_out[i] = result[0]
                sp_out[i] = result[1]
                chi_out[i] = result[2]


    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _level_index(lp, p):
        """(k, w): p lies between levels k and k + 1, at weight w linear in ln p (interpolate_levels);
        p is clipped into the level range first."""
        n_lev = lp.shape[0]
        p = _clip(p, lp[n_lev - 1], lp[0])
        below = -1
        for k in range(n_lev):
            if lp[k] >= p:
                below += 1
        k = min(max(below, 0), n_lev - 2)
        p0 = lp[k]
        p1 = lp[k + 1]
        return k, math.log(p0 / p) / math.log(p0 / p1)

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _opaque_top(obs, lo, lp, top_limit):
        """opaque_top_pressure of one pixel: (pressure [hPa], found)."""
        n_lev = lp.shape[0]
        for k in range(n_lev - 1):
            if lo[k] >= obs and lo[k + 1] < obs and lp[k + 1] >= top_limit:
                l0, l1 = float(lo[k]), float(lo[k + 1])
                w = _clip((l0 - obs) / (l0 - l1), 0.0, 1.0)
                x0 = math.log(lp[k])
                return math.exp(x0 + w * (math.log(lp[k + 1]) - x0)), True
        if obs >= lo[0]:
            return lp[0], False
        best = 0
        best_v = _INF
        for k in range(n_lev):
            v = lo[k] if lp[k] >= top_limit else _INF
            if v < best_v:
                best_v = v
                best = k
        return lp[best], False

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _layer_spacing(lp, p):
        """_layer_spacing of physics.cloud for one pixel [hPa]."""
        n_lev = lp.shape[0]
        below = -1
        for k in range(n_lev):
            if lp[k] >= p:
                below += 1
        k = min(max(below, 0), n_lev - 2)
        return 0.5 * p * abs(math.log(lp[k]) - math.log(lp[k + 1]))

    @fused._njit(parallel=True, fastmath=False, error_model="numpy", nogil=True)
    def _cloud_tops(obs, clr, s_obs, s_clr, corr, lp, lt, opq, top_limit, betas, method, fixed, assumed_p, r,
                    others, noise_sigmas, max_sigma_p, steps, p_out, sp_out, chi_out, assumed_out, tt_out):
        n, n_lev, n_ch = opq.shape
        n_phase = betas.shape[0]
        n_tiles = (n + _TILE - 1) // _TILE
        for tile in fused.numba.prange(n_tiles):
            # work arrays once per tile of pixels (an allocation per pixel would cost as much as its search)
            x = np.empty(n_lev)
            d = np.empty((n_lev, n_ch))
            allowed = np.empty(n_lev, np.bool_)
            usable = np.empty(n_lev, np.bool_)
            s = np.empty(n_ch)
            cov = np.empty((n_ch, n_ch))
            chi = np.empty(n_lev)
            dv = np.empty((1, n_ch))
            terms = np.empty((n_lev, 7))
            t_terms = np.empty((1, 7))
            m = max(others.size, 1)
            w_res, w_tc, w_g, w_h, w_cr = np.empty(m), np.empty(m), np.empty(m), np.empty(m), np.empty((m, m))
            result = np.empty(3)
            lpr = np.empty(n_lev)
            for i in range(tile * _TILE, min(n, (tile + 1) * _TILE)):
                for k in range(n_lev):  # the pixel's pressures in float64 (stored as float32)
                    lpr[k] = lp[i, k]
                bottom, top = lpr[0], lpr[n_lev - 1]
                p_opq, found = _opaque_top(obs[i, r], opq[i, :, r], lpr, top_limit[i])
                sp_opq = _layer_spacing(lpr, p_opq)
                if method == 2:
                    for k in range(n_lev):
                        allowed[k] = k > 0 and lpr[k] >= top_limit[i]
                        for c in range(n_ch):
                            d[k, c] = opq[i, k, c] - clr[i, c]
                    for a in range(n_ch):
                        s[a] = obs[i, a] - clr[i, a]
                        for b in range(n_ch):
                            cov[a, b] = corr[i, a, b] * s_clr[i, a] * s_clr[i, b]
                    need_logs = False
                    for ph in range(n_phase):
                        need_logs = need_logs or _needs_logs(betas[ph, i], others)
                    _level_pass(s, d, lpr, s_obs[i], cov, allowed, r, noise_sigmas, need_logs, usable, x, terms)
                    guess = _clip(assumed_p[i], top_limit[i], p_opq)
                    for ph in range(n_phase):
                        _search(s, d, lpr, x, s_obs[i], cov, betas[ph, i], usable, terms, r, others, steps,
                                need_logs, chi, dv, t_terms, w_res, w_tc, w_g, w_h, w_cr, result)
                        ok = math.isfinite(result[0]) and result[1] <= max_sigma_p and n_ch > 1
                        assumed = (not ok) and found
                        if ok:
                            p, sp, c2 = result[0], result[1], result[2]
                        elif assumed:
                            p, sp, c2 = guess, _INF, math.nan
                        else:
                            p, sp, c2 = p_opq, sp_opq, math.nan
                        p = _clip(p, top, bottom)
                        k, w = _level_index(lpr, p)
                        p_out[ph, i] = p
                        sp_out[ph, i] = sp
                        chi_out[ph, i] = c2
                        assumed_out[ph, i] = assumed
                        tt_out[ph, i] = float(lt[i, k]) + (float(lt[i, k + 1]) - float(lt[i, k])) * w
                else:
                    if method == 1:
                        p, sp = p_opq, sp_opq
                    else:
                        p, sp = fixed[i], 0.0
                    p = _clip(p, top, bottom)
                    k, w = _level_index(lpr, p)
                    for ph in range(n_phase):
                        p_out[ph, i] = p
                        sp_out[ph, i] = sp
                        chi_out[ph, i] = math.nan
                        assumed_out[ph, i] = False
                        tt_out[ph, i] = float(lt[i, k]) + (float(lt[i, k + 1]) - float(lt[i, k])) * w

    @fused._njit(fastmath=False, error_model="numpy", nogil=True)
    def _optics_ref(obs_r, clr_r, lo_r, lp, p, mu, eps_max):
        """τ of the reference channel at top p (the top-σ term of cloud_at_top)."""
        k, w = _level_index(lp, p)
        d = lo_r[k] + (lo_r[k + 1] - lo_r[k]) * w - clr_r
        e = _clip((obs_r - clr_r) / d, 0.0, eps_max)
        return -mu * math.log1p(-e)

    @fused._njit(parallel=True, fastmath=False, error_model="numpy", nogil=True)
    def _cloud_at_top(obs, clr, s_obs, s_clr, lp, lt, opq, mu, beta, p_top, sigma_p, chi2, assumed, cloudy, r,
                      eps_max, noise_sigmas, eps_out, s_eps_out, tau_out, s_tau_out, p_out, sp_out, tt_out,
                      status_out, uncertain_out, chi_out):
        n, n_lev, n_ch = opq.shape
        for tile in fused.numba.prange((n + _TILE - 1) // _TILE):
            lpi = np.empty(n_lev)
            for i in range(tile * _TILE, min(n, (tile + 1) * _TILE)):
                for k in range(n_lev):  # the pixel's pressures in float64 (stored as float32)
                    lpi[k] = lp[i, k]
                bottom, top = lpi[0], lpi[n_lev - 1]
                k, w = _level_index(lpi, p_top[i])
                tt = float(lt[i, k]) + (float(lt[i, k + 1]) - float(lt[i, k])) * w
                mu_i = mu[i]
                n_valid = 0
                sw = 0.0
                swt = 0.0
                any_cond = any_opq = any_beyond = any_warmer = False
                all_opq_like = True
                r_cond = r_opq = r_beyond = r_warmer = False
                for c in range(n_ch):
                    d = opq[i, k, c] + (opq[i, k + 1, c] - opq[i, k, c]) * w - clr[i, c]
                    eps = (obs[i, c] - clr[i, c]) / d
                    e01 = _clip(eps, 0.0, 1.0)
                    s_eps = math.sqrt(s_obs[i, c] ** 2 + (1.0 - e01) ** 2 * s_clr[i, c] ** 2) / abs(d)
                    cond = abs(d) > noise_sigmas * math.hypot(s_obs[i, c], s_clr[i, c])
                    opq_c = eps >= eps_max and eps <= 1.0 + noise_sigmas * s_eps
                    beyond = eps > 1.0 + noise_sigmas * s_eps
                    warmer = eps < -noise_sigmas * s_eps
                    valid = cond and eps < eps_max and not warmer and not beyond
                    if valid:
                        e_c = _clip(eps, 0.0, eps_max)
                        tau_ch = -mu_i * math.log1p(-e_c) / beta[i, c]
                        s_tau_ch = mu_i * s_eps / ((1.0 - e_c) * beta[i, c])
                        if s_tau_ch < 1e-6:
                            s_tau_ch = 1e-6
                        wt = 1.0 / s_tau_ch ** 2
                        sw += wt
                        swt += wt * tau_ch
                        n_valid += 1
                    any_cond = any_cond or cond
                    any_opq = any_opq or opq_c
                    any_beyond = any_beyond or beyond
                    any_warmer = any_warmer or warmer
                    all_opq_like = all_opq_like and (opq_c or beyond or not cond)
                    if c == r:
                        r_cond, r_opq, r_beyond, r_warmer = cond, opq_c, beyond, warmer
                    show = cloudy[i] and math.isfinite(eps) and cond
                    eps_out[i, c] = eps if show else math.nan
                    s_eps_out[i, c] = s_eps if show else math.nan
                tau = swt / sw
                s_tau = 1.0 / math.sqrt(sw)
                sp = sigma_p[i]
                if math.isfinite(sp) and sp > 0:
                    t0 = _optics_ref(obs[i, r], clr[i, r], opq[i, :, r], lpi, _clip(p_top[i] - sp, top, bottom), mu_i,
                                     eps_max)
                    t1 = _optics_ref(obs[i, r], clr[i, r], opq[i, :, r], lpi, _clip(p_top[i] + sp, top, bottom), mu_i,
                                     eps_max)
                    s_tau = math.hypot(s_tau, 0.5 * abs(t1 - t0))
                status = 0
                if r_cond:
                    if r_opq:
                        status = 1
                    if r_beyond:
                        status = 2
                    if r_warmer:
                        status = 3
                else:
                    if all_opq_like and any_opq:
                        status = 1
                    if n_valid == 0 and any_beyond and not any_opq:
                        status = 2
                    if n_valid == 0 and any_warmer and not any_opq and not any_beyond:
                        status = 3
                if not any_cond:
                    status = 4
                if n_valid == 0 and status == 0:
                    status = 4
                if assumed[i] and status == 0:
                    status = 6
                if not cloudy[i]:
                    status = 5
                if status == 1:
                    tau = -mu_i * math.log1p(-eps_max)
                    s_tau = _INF
                keep = status == 0 or status == 1 or status == 6
                if not keep:
                    tau = math.nan
                    s_tau = math.nan
                tau_out[i] = tau
                s_tau_out[i] = s_tau
                status_out[i] = status
                uncertain_out[i] = keep and not (s_tau <= tau)
                if cloudy[i]:
                    p_out[i], sp_out[i], tt_out[i], chi_out[i] = p_top[i], sp, tt, chi2[i]
                else:
                    p_out[i] = sp_out[i] = tt_out[i] = chi_out[i] = math.nan


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


METHODS = {"fixed": 0, "opaque": 1, "consistent": 2}


def _f64(a, shape):
    return np.ascontiguousarray(np.broadcast_to(np.asarray(a, dtype=float), shape))


def _f32(a, shape):
    return np.ascontiguousarray(np.broadcast_to(np.asarray(a, dtype=np.float32), shape))


def cloud_tops(obs, clr, s_obs, s_clr, corr, lp, lt, opq, top_limit, betas, method, fixed, assumed_pressure,
               reference, noise_sigmas, max_sigma_pressure, steps):
    """The compiled :func:`physics.cloud.cloud_tops` on (n, ...) arrays: (pressure, σ, χ², assumed,
    top temperature), each (n_phase, n). ``lp``, ``lt`` (n, n_levels) and ``opq`` (n, n_levels, n_ch)
    are read as float32 (what the scene's simulation stores; no float64 copies of the largest
    arrays), everything else as float64."""
    n, n_lev, n_ch = opq.shape
    n_phase = len(betas)
    out = [np.empty((n_phase, n)) for _ in range(3)] + [np.empty((n_phase, n), np.bool_), np.empty((n_phase, n))]
    others = np.array([k for k in range(n_ch) if k != reference], np.int64)
    fused._run_kernel(
        _cloud_tops, _f64(obs, (n, n_ch)), _f64(clr, (n, n_ch)), _f64(s_obs, (n, n_ch)), _f64(s_clr, (n, n_ch)),
        _f64(corr, (n, n_ch, n_ch)), _f32(lp, (n, n_lev)), _f32(lt, (n, n_lev)),
        np.ascontiguousarray(opq, dtype=np.float32), _f64(top_limit, (n,)),
        np.ascontiguousarray(np.stack([np.broadcast_to(np.asarray(b, dtype=float), (n, n_ch)) for b in betas])),
        METHODS[method], _f64(fixed, (n,)), _f64(assumed_pressure, (n,)), int(reference), others,
        float(noise_sigmas), float(max_sigma_pressure), int(steps), *out)
    return out


def cloud_at_top(obs, clr, s_obs, s_clr, lp, lt, opq, mu, beta, top, cloudy, reference, eps_max, noise_sigmas):
    """The compiled :func:`physics.cloud.cloud_at_top` on (n, ...) arrays: the fields of a
    ``CloudRetrieval`` in its order (level inputs read as float32, as in :func:`cloud_tops`)."""
    n, n_lev, n_ch = opq.shape
    p_top, sigma_p, chi2, assumed = top
    eps, s_eps = np.empty((n, n_ch)), np.empty((n, n_ch))
    tau, s_tau, p, sp, tt, chi = (np.empty(n) for _ in range(6))
    status, uncertain = np.empty(n, np.int8), np.empty(n, np.bool_)
    fused._run_kernel(
        _cloud_at_top, _f64(obs, (n, n_ch)), _f64(clr, (n, n_ch)), _f64(s_obs, (n, n_ch)), _f64(s_clr, (n, n_ch)),
        _f32(lp, (n, n_lev)), _f32(lt, (n, n_lev)), np.ascontiguousarray(opq, dtype=np.float32), _f64(mu, (n,)),
        _f64(beta, (n, n_ch)), _f64(p_top, (n,)), _f64(sigma_p, (n,)), _f64(chi2, (n,)),
        np.ascontiguousarray(np.broadcast_to(assumed, (n,)), np.bool_),
        np.ascontiguousarray(np.broadcast_to(cloudy, (n,)), np.bool_), int(reference), float(eps_max),
        float(noise_sigmas), eps, s_eps, tau, s_tau, p, sp, tt, status, uncertain, chi)
    return eps, s_eps, tau, s_tau, p, sp, tt, status, uncertain, chi


def warm_up():
    """Compile the kernels (or load them from numba's cache) on one small pixel."""
    if not fused.enabled():
        return
    n_lev = 4
    lp = np.linspace(1000.0, 100.0, n_lev)[None]
    d = -np.linspace(0.0, 30.0, n_lev)[None, :, None] * np.ones((1, 1, 3))
    consistent_top(np.full((1, 3), -5.0), d, lp, np.full((1, 3), 0.1), np.eye(3)[None] * 0.01, np.ones((1, 3)),
                   np.ones((1, n_lev), bool), 1, 2.0, 9)
    clr = np.full((1, 3), 100.0)
    opq = (clr[:, None, :] + d).astype(np.float32)
    lt = np.linspace(290.0, 220.0, n_lev)[None]
    sig = np.full((1, 3), 0.1)
    tops = cloud_tops(clr - 5.0, clr, sig, sig, np.eye(3)[None], lp, lt, opq, lp[:, -1], [np.ones(3)], "consistent",
                      np.full(1, np.nan), np.full(1, 350.0), 1, 2.0, 100.0, 9)
    cloud_at_top(clr - 5.0, clr, sig, sig, lp, lt, opq, np.ones(1), np.ones((1, 3)), [t[0] for t in tops[:4]],
                 np.ones(1, bool), 1, 0.99, 2.0)
