r"""Compiled float32 kernels of the clear-sky hot path (profile builder and simulation).

The numpy functions of :mod:`physics.atmosphere`, :mod:`physics.absorption`,
:mod:`physics.clearsky` and :mod:`physics.transfer` are the reference implementation. They
make one whole-array pass per arithmetic step (about thirty passes over every
level × channel × pixel element), so their speed is set by memory traffic, not by the
arithmetic. The kernels here evaluate the *same formulas* in one sweep over the levels,
with each step's intermediate values held in registers, compiled by numba for float32.
The tests hold the two paths to each other (tests/test_fused.py).

Dispatch
--------
:func:`dispatch` is the one place that chooses between them (``profile_levels_first`` and
``simulate_channel_major`` hand it their compiled and numpy variants): float32 input goes to
the kernels while :func:`enabled`; float64 input, any run with the environment variable
``CLOUDSIEVE_PHYSICS=numpy``, and a process whose kernels numba could not build or run (warned
once, :data:`failure` says why) take the numpy path.

This module imports nothing from the other physics modules but :mod:`physics.constants`:
channels and absorption coefficients come in as plain arrays. Nothing here does I/O; the
kernels take and fill numpy arrays, pixel axis last, and work on any block of pixels
independently of the others (chunk-invariant, tested).

Elementary functions
--------------------
numba would call the C library for ``exp`` and ``log`` one value at a time, which blocks
vectorisation (≈ 4 ns per call here against ≈ 0.5 ns for numpy's SIMD loops). The kernels
therefore use their own branch-free float32 ``exp``/``expm1`` and ``log`` that the compiler
vectorises:

* e^x and e^x − 1 together: x = k ln 2 + r with k = round(x / ln 2) and |r| ≤ ln 2 / 2, ln 2
  split in a high and a low part (Cody & Waite 1980, *Software Manual for the Elementary
  Functions*, ch. 6); e^r − 1 = r·(1 + r/2 + … ) by its Taylor polynomial to degree 7
  (truncation < 1e-8 relative), free of cancellation near 0; 2ᵏ built in the exponent bits
  of an IEEE 754 single; then e^x = 2ᵏ(e^r − 1) + 2ᵏ and e^x − 1 = 2ᵏ(e^r − 1) + (2ᵏ − 1).
  The linear-in-τ layer weight (1 − e^{−δ})/δ is −expm1(−δ)/δ, accurate for thin layers too;
* log(x) = k·ln 2 + 2 artanh(s), s = (m − 1)/(m + 1), with x = 2ᵏ·m and m in [√½, √2)
  read from the bits, artanh by its odd series to s⁹ (|s| ≤ 0.172; truncation < 1e-9).

Their relative error is a few units in the last place of float32 (tested against numpy in
float64). The only fast-math flag is FMA contraction, and no loop reduces across pixels, so
every pixel is computed by the same sequence of operations whether it falls in a vector lane
or in the scalar remainder of a loop: a pixel's result does not depend on where the chunking
puts it (tested bit for bit).
"""
import os
import threading
import warnings

import numpy as np

from .constants import (
    C1_RADIANCE,
    C2_CM_K,
    CONTINUUM_REFERENCE_T,
    DIFFUSIVITY_FACTOR,
    EPSILON,
    GRAVITY,
    STANDARD_PRESSURE_HPA,
)

try:  # numba is a dependency (datashader needs it too); a broken install falls back to numpy
    import numba
    from llvmlite import ir as _ir
    from numba.core import types as _types
    from numba.extending import intrinsic as _intrinsic
except ImportError:  # pragma: no cover - exercised only without numba
    numba = None

F = np.float32
#: pixels per tile: the per-tile work arrays (levels × channels × tile floats) stay in L2
TILE = 256


#: why the compiled path was given up in this process (None while it works)
failure = None


class Unavailable(RuntimeError):
    """The compiled kernels could not be built or run here; the caller takes the numpy path."""


def enabled():
    """True when the compiled kernels are used for float32 input."""
    return (numba is not None and failure is None
            and os.environ.get("CLOUDSIEVE_PHYSICS", "").lower() != "numpy")


def use_compiled(dtype):
    """True when input of ``dtype`` goes to the compiled kernels: float32 while :func:`enabled`."""
    return np.dtype(dtype) == np.float32 and enabled()


def dispatch(dtype, compiled, reference, *args):
    """``compiled(*args)`` where :func:`use_compiled` says so, else ``reference(*args)``, the numpy path.

    The one place where the physics chooses its implementation. Should the kernels turn out
    unusable here (:class:`Unavailable`: :func:`_run_kernel` has warned once and switched the
    process off), the numpy path runs instead; any other error (bad input) propagates.
    """
    if use_compiled(dtype):
        try:
            return compiled(*args)
        except Unavailable:
            pass  # warned once; the numpy path below
    return reference(*args)


def _run_kernel(kernel, *args):
    """Call a kernel; if numba cannot compile or run it on this machine, say so once and
    switch the process to the numpy path (same results to float32 rounding) instead of failing
    the user's run."""
    global failure
    try:
        return kernel(*args)
    except Exception as exc:  # noqa: BLE001 - any compiler/runtime failure; inputs were checked before
        failure = f"{type(exc).__name__}: {exc}".splitlines()[0][:300]
        warnings.warn(f"cloudsieve: the compiled physics kernels are unavailable here ({failure}); "
                      "using the numpy path (same results, about four times slower). Set "
                      "CLOUDSIEVE_PHYSICS=numpy to skip the attempt.", RuntimeWarning, stacklevel=3)
        raise Unavailable(failure) from exc


def _njit(**options):
    """numba.njit with on-disk caching where numba finds a writable cache folder, without it elsewhere."""
    def decorate(fn):
        try:
            return numba.njit(cache=True, **options)(fn)
        except RuntimeError:  # no writable cache location (read-only install and home)
            return numba.njit(**options)(fn)
    return decorate


if numba is not None:

    @_intrinsic
    def _bits_to_f32(typingctx, i):
        def codegen(context, builder, signature, args):
            return builder.bitcast(args[0], _ir.FloatType())

        return _types.float32(_types.int32), codegen

    @_intrinsic
    def _f32_to_bits(typingctx, x):
        def codegen(context, builder, signature, args):
            return builder.bitcast(args[0], _ir.IntType(32))

        return _types.int32(_types.float32), codegen

    _jit = _njit(nogil=True, error_model="numpy", fastmath={"contract"})
    _scalar = _njit(error_model="numpy", fastmath={"contract"})

    _LOG2E = F(1.4426950408889634)
    _LN2_HI = F(0.693145751953125)  # ln 2 to 16 bits: k·_LN2_HI is exact for |k| < 2⁸
    _LN2_LO = F(1.4286068203094172e-06)  # ln 2 − _LN2_HI
    _LN2 = F(0.6931471805599453)
    _SQRT_HALF_BITS = np.int32(0x3F3504F3)  # bits of √½
    _E2, _E3, _E4, _E5, _E6, _E7 = (F(1.0 / c) for c in (2.0, 6.0, 24.0, 120.0, 720.0, 5040.0))
    _A3, _A5, _A7, _A9 = F(1.0 / 3.0), F(1.0 / 5.0), F(1.0 / 7.0), F(1.0 / 9.0)
    _ONE, _HALF, _ZERO = F(1.0), F(0.5), F(0.0)

    @_scalar
    def exp_and_expm1_32(x):
        """(e^x, e^x − 1) in float32, each to a few units in the last place; NaN stays NaN;
        x clipped to [−87, 88] (no overflow, no subnormals)."""
        if x < F(-87.0):
            x = F(-87.0)
        if x > F(88.0):
            x = F(88.0)
        k = np.floor(x * _LOG2E + _HALF)
        r = x - k * _LN2_HI
        r = r - k * _LN2_LO
        p = _E7
        p = p * r + _E6
        p = p * r + _E5
        p = p * r + _E4
        p = p * r + _E3
        p = p * r + _E2
        p = p * r + _ONE
        q = p * r  # e^r − 1, free of cancellation
        two_k = _bits_to_f32((np.int32(k) + np.int32(127)) << np.int32(23))
        return two_k * q + two_k, two_k * q + (two_k - _ONE)  # 2ᵏ − 1 is exact for these k

    @_scalar
    def exp32(x):
        return exp_and_expm1_32(x)[0]

    @_scalar
    def expm1_32(x):
        return exp_and_expm1_32(x)[1]

    @_scalar
    def log32(x):
        """ln x in float32 for normal x > 0 (the kernels' pressure ratios)."""
        bits = _f32_to_bits(x) - _SQRT_HALF_BITS
        k = bits >> np.int32(23)  # exponent such that m = x / 2ᵏ lies in [√½, √2)
        m = _bits_to_f32((bits & np.int32(0x007FFFFF)) + _SQRT_HALF_BITS)
        s = (m - _ONE) / (m + _ONE)
        s2 = s * s
        t = _A9
        t = t * s2 + _A7
        t = t * s2 + _A5
        t = t * s2 + _A3
        t = t * s2 + _ONE
        return F(k) * _LN2 + F(2.0) * s * t

    @_jit
    def _exp_log_kernel(x, out_exp, out_log):  # for the tests
        for i in range(x.size):
            out_exp[i] = exp32(x[i])
            out_log[i] = log32(x[i]) if x[i] > _ZERO else _ZERO

    @_jit
    def _expm1_kernel(x, out):  # for the tests
        for i in range(x.size):
            out[i] = expm1_32(x[i])

    @_jit
    def _profile_kernel(t_air, tcwv, ps, sigma, top, lapse_exponent, trop_t_max, humidity_exponent,
                        strat_q, q_floor, p_out, t_out, q_out, q_sat, shape, scratch):
        n_lev, n_pix = p_out.shape
        dp_scale = F(100.0 / GRAVITY)
        one_minus_eps = F(1.0 - EPSILON)
        eps = F(EPSILON)
        column, scale, trop_t = scratch[0], scratch[1], scratch[2]
        for start in range(0, n_pix, TILE):
            stop = min(start + TILE, n_pix)
            m = stop - start
            ta, tw, pss = t_air[start:stop], tcwv[start:stop], ps[start:stop]
            for i in range(m):
                # a surface colder than the tropopause value (polar winter) keeps its own temperature aloft
                trop_t[i] = trop_t_max if trop_t_max < ta[i] else ta[i]
            for j in range(n_lev):
                s = sigma[j]
                pj, tj, qsj, shj = p_out[j, start:stop], t_out[j, start:stop], q_sat[j], shape[j]
                for i in range(m):
                    p = top + (pss[i] - top) * s
                    lr = log32(p / pss[i])
                    t = exp32(lr * lapse_exponent) * ta[i]
                    tt = trop_t[i]
                    # above the tropopause (unless the column is isothermal) the humidity is capped
                    cap = (t <= tt) & (tt < ta[i])
                    t = t if t > tt else tt
                    tc = t - F(273.15)
                    e_s = F(6.112) * exp32(F(17.67) * tc / (tc + F(243.5)))
                    qs = eps * e_s / (p - one_minus_eps * e_s)
                    qs = strat_q if (cap & (qs > strat_q)) else qs
                    pj[i] = p
                    tj[i] = t
                    qsj[i] = qs
                    shj[i] = p / pss[i]  # (p/p_s), raised to the humidity exponent below
                # the default exponent 3 needs no exponential (same value to rounding)
                if humidity_exponent == F(3.0):
                    for i in range(m):
                        shj[i] = shj[i] * shj[i] * shj[i]
                else:
                    for i in range(m):
                        shj[i] = exp32(humidity_exponent * log32(shj[i]))
            for it in range(4):  # the shape's column, two refinements of the scale, then the final q
                for i in range(m):
                    column[i] = _ZERO
                for j in range(n_lev):
                    qj, shj, qsj = q_out[j, start:stop], shape[j], q_sat[j]
                    if it == 0:
                        for i in range(m):
                            qj[i] = shj[i]
                    elif it < 3:
                        for i in range(m):
                            v = shj[i] * scale[i]
                            qj[i] = v if v < qsj[i] else qsj[i]
                    else:
                        for i in range(m):
                            v = shj[i] * scale[i]
                            v = v if v < qsj[i] else qsj[i]
                            qj[i] = v if v > q_floor else q_floor
                    if j > 0 and it < 3:
                        qb, pb, pj = q_out[j - 1, start:stop], p_out[j - 1, start:stop], p_out[j, start:stop]
                        for i in range(m):
                            column[i] += _HALF * (qb[i] + qj[i]) * ((pb[i] - pj[i]) * dp_scale)
                if it == 0:
                    for i in range(m):
                        scale[i] = tw[i] / column[i]
                elif it < 3:
                    for i in range(m):
                        w = column[i]
                        scale[i] = scale[i] * (tw[i] / w) if w > _ZERO else scale[i]

    @_jit
    def _simulate_kernel(p, t, q, t_skin, emis, inv_mu, c1nu3, c2nu, band_a, band_b, k_self, k_for, k_line, k_dry,
                         continuum_t0, line_exponent, diffusivity, radiance, bt, surf_trans, trans, opaque, want_levels,
                         tau, inv_tau, b, x4, state):
        n_lev, n_pix = p.shape
        n_lay = n_lev - 1
        n_ch = c1nu3.size
        inv_p0 = F(1.0 / STANDARD_PRESSURE_HPA)
        u_scale = F(100.0 / GRAVITY)
        eps = F(EPSILON)
        one_minus_eps = F(1.0 - EPSILON)
        inv_t_ref = F(1.0 / CONTINUUM_REFERENCE_T)
        tiny = F(1.0e-30)
        inv_diffusivity = _ONE / diffusivity
        x_self, x_for, x_line, x_dry = x4[0], x4[1], x4[2], x4[3]
        for start in range(0, n_pix, TILE):
            stop = min(start + TILE, n_pix)
            m = stop - start
            # Planck radiance of every level and channel (band-corrected, physics.clearsky.channel_planck)
            for j in range(n_lev):
                tj = t[j, start:stop]
                for c in range(n_ch):
                    bjc = b[j, c]
                    c1, c2, ba, bb = c1nu3[c], c2nu[c], band_a[c], band_b[c]
                    for i in range(m):
                        bjc[i] = c1 / expm1_32(c2 / (ba + bb * tj[i]))
            # layer optical depths (physics.absorption: Roberts et al. continuum, lines, dry gases)
            for j in range(n_lay):
                p0, p1 = p[j, start:stop], p[j + 1, start:stop]
                t0, t1 = t[j, start:stop], t[j + 1, start:stop]
                q0, q1 = q[j, start:stop], q[j + 1, start:stop]
                for i in range(m):
                    p_lay = _HALF * (p0[i] + p1[i])
                    t_lay = _HALF * (t0[i] + t1[i])
                    q_lay = _HALF * (q0[i] + q1[i])
                    dp = p0[i] - p1[i]
                    u = q_lay * dp * u_scale
                    e = q_lay * p_lay / (eps + one_minus_eps * q_lay)
                    p_rel = p_lay * inv_p0
                    u_f = u * exp32(continuum_t0 * (_ONE / t_lay - inv_t_ref))  # both continua: f(T)
                    x_self[i] = u_f * (e * inv_p0)
                    x_for[i] = u_f * (p_rel - e * inv_p0)
                    x_line[i] = u  # times (p/p₀)ⁿ below
                    x_dry[i] = F(2.0) * p_rel * (dp * inv_p0)
                # square-root scaling (n = ½, the data file's value) needs no exponential
                if line_exponent == _HALF:
                    for i in range(m):
                        x_line[i] *= np.sqrt(_HALF * (p0[i] + p1[i]) * inv_p0)
                else:
                    for i in range(m):
                        x_line[i] *= exp32(line_exponent * log32(_HALF * (p0[i] + p1[i]) * inv_p0))
                for c in range(n_ch):
                    tjc, rjc = tau[j, c], inv_tau[j, c]
                    ks, kf, kl, kd = k_self[c], k_for[c], k_line[c], k_dry[c]
                    for i in range(m):
                        d = x_self[i] * ks + x_for[i] * kf + x_line[i] * kl + x_dry[i] * kd
                        d = d if d > tiny else tiny
                        tjc[i] = d
                        rjc[i] = _ONE / d
            mu_inv = inv_mu[start:stop]
            mu = x4[0]  # the absorber amounts are no longer needed
            for i in range(m):
                mu[i] = _ONE / mu_inv[i]
            for c in range(n_ch):
                s_tr, acc, down = state[0, c], state[1, c], state[2, c]
                # downwelling at the surface along the diffusivity path, summed upwards:
                # L↓ = B_0 − B_n 𝒮_n − Σ_j (B_j − B_{j+1}) 𝒮_j g'_j
                for i in range(m):
                    s_tr[i] = _ONE
                    acc[i] = _ZERO
                for j in range(n_lay):
                    tjc, rjc, b0, b1 = tau[j, c], inv_tau[j, c], b[j, c], b[j + 1, c]
                    for i in range(m):
                        e, em1 = exp_and_expm1_32(-diffusivity * tjc[i])  # e^{−δ'}, e^{−δ'} − 1
                        # (B_j − B_{j+1}) 𝒮_j g'_j with g' = (1 − e^{−δ'})/δ'
                        acc[i] -= (b0[i] - b1[i]) * (s_tr[i] * (em1 * (rjc[i] * inv_diffusivity)))
                        s_tr[i] *= e
                b_bottom, b_top = b[0, c], b[n_lay, c]
                for i in range(m):
                    down[i] = (b_bottom[i] - b_top[i] * s_tr[i]) - acc[i]
                # upwelling along the view, summed downwards from the top:
                # L_k^opq = B_n + Σ_{j ≥ k} (B_j − B_{j+1}) 𝒯_{j+1} g_j and 𝒯_j = 𝒯_{j+1} e^{−δ_j}
                tr = s_tr
                for i in range(m):
                    tr[i] = _ONE
                    acc[i] = b_top[i]
                if want_levels:
                    t_out, o_out = trans[n_lay, c, start:stop], opaque[n_lay, c, start:stop]
                    for i in range(m):
                        t_out[i] = _ONE
                        o_out[i] = acc[i]
                for j in range(n_lay - 1, -1, -1):
                    tjc, rjc, b0, b1 = tau[j, c], inv_tau[j, c], b[j, c], b[j + 1, c]
                    for i in range(m):
                        e, em1 = exp_and_expm1_32(-tjc[i] * mu_inv[i])  # e^{−δ}, e^{−δ} − 1
                        acc[i] -= (b0[i] - b1[i]) * (tr[i] * (em1 * (rjc[i] * mu[i])))
                        tr[i] *= e
                    if want_levels:
                        t_out, o_out = trans[j, c, start:stop], opaque[j, c, start:stop]
                        for i in range(m):
                            t_out[i] = tr[i]
                            o_out[i] = acc[i]
                ts, ec = t_skin[start:stop], emis[c, start:stop]
                rad, st, btc = radiance[c, start:stop], surf_trans[c, start:stop], bt[c, start:stop]
                c1, c2, ba, bb = c1nu3[c], c2nu[c], band_a[c], band_b[c]
                for i in range(m):
                    b_s = c1 / expm1_32(c2 / (ba + bb * ts[i]))
                    surface = ec[i] * b_s + (_ONE - ec[i]) * down[i]
                    r = tr[i] * (surface - b_bottom[i]) + acc[i]
                    rad[i] = r
                    st[i] = tr[i]
                    # brightness temperature (physics.planck.brightness_temperature, band-corrected)
                    btc[i] = (c2 / log32(_ONE + c1 / r) - ba) / bb if r > _ZERO else np.nan


_local = threading.local()


def _workspace(name, size):
    """A float32 scratch vector of at least ``size`` elements, kept per thread and reused:
    fresh scratch arrays every chunk cost page faults that take as long as the arithmetic."""
    buf = getattr(_local, name, None)
    if buf is None or buf.size < size:
        buf = np.empty(size, F)
        setattr(_local, name, buf)
    return buf[:size]


def _f32(a):
    return np.ascontiguousarray(a, dtype=F)


def profile(t_air, tcwv, surface_pressure, sigma, top_pressure, lapse_exponent, tropopause_temperature,
            humidity_exponent, strat_q, q_floor):
    """Compiled :func:`physics.atmosphere.profile_levels_first` for float32 pixel vectors.

    ``sigma`` holds the levels' σ = (p − p_top)/(p_s − p_top), surface (1) first;
    ``lapse_exponent`` is R_d Γ / g. Returns (pressure [hPa], temperature [K], specific
    humidity [kg kg⁻¹]), each (n_levels, n_pixels) float32.
    """
    t_air, tcwv, ps = (_f32(a).ravel() for a in np.broadcast_arrays(t_air, tcwv, surface_pressure))
    n_lev, n_pix = len(sigma), t_air.size
    p, t, q = np.empty((3, n_lev, n_pix), F)  # one block: glibc reuses it chunk after chunk
    tile = min(TILE, max(n_pix, 1))
    work = _workspace("profile", (2 * n_lev + 3) * tile)
    _run_kernel(_profile_kernel, t_air, tcwv, ps, _f32(sigma), F(top_pressure), F(lapse_exponent),
                F(tropopause_temperature), F(humidity_exponent), F(strat_q), F(q_floor), p, t, q,
                work[:n_lev * tile].reshape(n_lev, tile), work[n_lev * tile:2 * n_lev * tile].reshape(n_lev, tile),
                work[2 * n_lev * tile:].reshape(3, tile))
    return p, t, q


def simulate(pressure, temperature, specific_humidity, t_skin, emissivity, inv_mu, wavenumber, band_a, band_b,
             k_matrix, continuum_t0, line_pressure_exponent, levels, diffusivity=DIFFUSIVITY_FACTOR):
    """Compiled clear-sky simulation of level-first float32 columns (see ``simulate_channel_major``).

    The channels come in as arrays (n_ch,): centroid ``wavenumber`` [cm⁻¹] and band correction
    ``band_a`` [K], ``band_b`` [1]; the absorption as the (4, n_ch) ``k_matrix`` of
    ``ChannelCoefficients.matrix()`` with its ``continuum_t0`` [K] and ``line_pressure_exponent``.
    Returns (radiance (n_ch, n_pix), brightness temperature [K] (n_ch, n_pix; NaN where the
    radiance is not positive), surface transmittance (n_ch, n_pix), level transmittance
    (n_levels, n_ch, n_pix) or None, opaque-level radiance (n_levels, n_ch, n_pix) or None).
    """
    p, t, q = _f32(pressure), _f32(temperature), _f32(specific_humidity)
    n_lev, n_pix = p.shape
    nu = np.asarray(wavenumber, dtype=np.float64)
    n_ch = nu.size
    if t.shape != p.shape or q.shape != p.shape or n_lev < 2:
        raise ValueError(f"pressure, temperature and humidity must share one (levels ≥ 2, pixels) shape; "
                         f"got {p.shape}, {t.shape}, {q.shape}")
    # the kernel indexes these directly: give them their full shapes (a clear error if they cannot have them)
    t_skin = np.broadcast_to(np.asarray(t_skin, F), (n_pix,))
    emissivity = np.broadcast_to(np.asarray(emissivity, F), (n_ch, n_pix))
    inv_mu = np.broadcast_to(np.asarray(inv_mu, F), (n_pix,))
    c1nu3, c2nu = _f32(C1_RADIANCE * nu**3), _f32(C2_CM_K * nu)
    band_a = _f32(band_a)
    band_b = _f32(band_b)
    k = np.asarray(k_matrix).astype(F)
    radiance, bt, surf_trans = np.empty((3, n_ch, n_pix), F)
    if levels:
        trans = np.empty((n_lev, n_ch, n_pix), F)
        opaque = np.empty((n_lev, n_ch, n_pix), F)
    else:
        trans = opaque = np.empty((1, 1, 1), F)
    tile = min(TILE, max(n_pix, 1))
    n_lay = n_lev - 1
    sizes = (n_lay * n_ch * tile, n_lay * n_ch * tile, n_lev * n_ch * tile, 4 * tile, 3 * n_ch * tile)
    work = _workspace("simulate", sum(sizes))
    bounds = np.cumsum((0,) + sizes)
    tau, inv_tau, b, x4, state = (work[a:z] for a, z in zip(bounds[:-1], bounds[1:]))
    _run_kernel(_simulate_kernel, p, t, q, _f32(t_skin), _f32(emissivity), _f32(inv_mu), c1nu3, c2nu, band_a, band_b,
                _f32(k[0]), _f32(k[1]), _f32(k[2]), _f32(k[3]), F(continuum_t0),
                F(line_pressure_exponent), F(diffusivity), radiance, bt, surf_trans, trans, opaque,
                bool(levels), tau.reshape(n_lay, n_ch, tile), inv_tau.reshape(n_lay, n_ch, tile),
                b.reshape(n_lev, n_ch, tile), x4.reshape(4, tile), state.reshape(3, n_ch, tile))
    if not levels:
        trans = opaque = None
    return radiance, bt, surf_trans, trans, opaque


def warm_up():
    """Compile both kernels (or load them from numba's cache) on a one-pixel column.

    The first compilation on a machine takes several seconds; numba caches the machine
    code next to this module (or in the user's cache directory when that is read-only), so
    later processes only load it (≈ 0.5 s).
    """
    if not enabled():
        return
    one = np.ones(1, F)
    p, t, q = profile(one * F(280.0), one * F(20.0), one * F(1000.0), np.linspace(1.0, 0.0, 3), 10.0, 0.19,
                      210.0, 3.0, 3.0e-6, 3.0e-7)
    simulate(p, t, q, one * F(281.0), np.ones((1, 1), F), one, [926.0], [0.0], [1.0], np.zeros((4, 1)), 1800.0, 1.0,
             True)
