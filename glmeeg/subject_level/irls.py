"""The compiled kernel of the robust fit: iteratively reweighted least squares at every point
of a chunk (numba; compiled on first use, cached on disk). See :func:`glmeeg.subject_level.fit_robust`
for the method and :mod:`glmeeg.subject_level.robust` for the settings it is given."""

from __future__ import annotations

import functools
import math

import numpy as np


@functools.cache
def compiled_irls():
    """The compiled IRLS kernel (numba, imported only here) and numba's thread-count getter."""
    import numba

    # reassoc lets the per-point sums over trials use SIMD; each point's arithmetic is still the
    # same code on the same values, so results do not depend on the block or thread count.
    # nogil: the chunks of points run in threads of this process.
    kernel = numba.njit(cache=True, nogil=True, error_model="numpy",
                        fastmath={"reassoc", "contract"})(_irls_kernel)
    return kernel, numba.get_num_threads


def _irls_kernel(Y, start, stop, rows, root_w, xct, gram_rows, ols_map, norm_code, c,
                 max_iterations, tolerance, conv_code, exact_fits, refresh_change, mad_constant,
                 pivot_floor,
                 band_start, band_first, band_min, band_max, block, gamma_out, scale_out,
                 factor_out, weight_out, iter_out, conv_out):  # pragma: no cover - compiled
    """IRLS at the points ``start:stop`` of ``Y`` (see :func:`fit_robust`), written into the
    output arrays, in conditioned coordinates.

    ``xct`` is the conditioned, prior-weighted design (columns x used trials), ``gram_rows`` its
    products ``xc_k * xc_l`` (k <= l) per trial, ``ols_map`` the least-squares map.

    Per point, per iteration: residuals; the median of |r| by selection within a band around a
    guess (all trials if the band misses the middle order statistics; the guesses - the last
    median, or the previous point's for the least-squares start - change the work, never the
    result); weights; the weighted least-squares step in correction form,
    ``g += (Xc' W Xc)^-1 Xc' W r``. Its fixed point solves ``Xc' W r = 0`` (the M-estimating
    equations) whichever cross-product matrix is used, so the Cholesky factor of ``Xc' W Xc``
    is re-formed only for the first ``exact_fits`` fits (the plain IRLS iterates) and then when
    some weight has moved by more than ``refresh_change`` since it was formed; near convergence
    the weights settle and each step costs the residuals, the median, the weights and
    ``Xc' W r``.
    """
    p = xct.shape[0]
    m = rows.size
    q = gram_rows.shape[0]
    k1 = (m - 1) // 2
    k2 = m // 2
    r = np.empty(m)
    rprev = np.empty(m)
    zp = np.empty(m)
    sel = np.empty(m)
    wt = np.empty(m)
    wr = np.empty(m)
    wref = np.empty(m)
    g = np.empty(p)
    A = np.empty((p, p))
    At = np.empty(q)
    L = np.empty((p, p))
    rhs = np.empty(p)
    ybuf = np.empty((block, m))
    start_guess = -1.0
    for lo in range(start, stop, block):
        w = min(lo + block, stop) - lo
        for i in range(m):
            row = rows[i]
            rw = root_w[i]
            for j in range(w):
                ybuf[j, i] = np.float64(Y[row, lo + j]) * rw
        for j in range(w):
            y = ybuf[j]
            probe = 0.0
            for i in range(m):
                probe += y[i] * 0.0
            if probe != 0.0:  # NaN: the point holds NaN or infinity; outputs stay NaN
                continue
            for k in range(p):
                acc = 0.0
                for i in range(m):
                    acc += ols_map[k, i] * y[i]
                g[k] = acc
            fits = 0
            converged = False
            guess = start_guess
            band = band_start
            mean_w = 1.0
            s = 0.0
            while True:
                # residuals of the current coefficients, four columns per pass over the trials
                for i in range(m):
                    r[i] = y[i]
                k = 0
                while k + 4 <= p:
                    g0 = g[k]
                    g1 = g[k + 1]
                    g2 = g[k + 2]
                    g3 = g[k + 3]
                    for i in range(m):
                        r[i] -= ((xct[k, i] * g0 + xct[k + 1, i] * g1)
                                 + (xct[k + 2, i] * g2 + xct[k + 3, i] * g3))
                    k += 4
                while k < p:
                    gk = g[k]
                    for i in range(m):
                        r[i] -= xct[k, i] * gk
                    k += 1
                relative_done = False
                if conv_code == 1:  # ||r_old - r|| <= tolerance ||r_old||
                    if fits > 0:
                        dd = 0.0
                        oo = 0.0
                        for i in range(m):
                            d = rprev[i] - r[i]
                            dd += d * d
                            oo += rprev[i] * rprev[i]
                        relative_done = math.sqrt(dd / max(1e-20, oo)) <= tolerance
                    for i in range(m):
                        rprev[i] = r[i]
                # median of |r|: branch-free compaction of a band around the guess
                below = 0
                cnt = 0
                use_band = False
                if guess > 0.0:
                    lo_v = guess * (1.0 - band)
                    hi_v = guess * (1.0 + band)
                    for i in range(m):
                        v = abs(r[i])
                        sel[cnt] = v
                        cnt += np.int64((v >= lo_v) & (v <= hi_v))
                        below += np.int64(v < lo_v)
                    use_band = below <= k1 and below + cnt > k2
                if not use_band:
                    below = 0
                    cnt = m
                    for i in range(m):
                        sel[i] = abs(r[i])
                kk = k1 - below
                if cnt <= 16:  # insertion sort of a few values
                    for i in range(1, cnt):
                        v = sel[i]
                        h = i - 1
                        while h >= 0 and sel[h] > v:
                            sel[h + 1] = sel[h]
                            h -= 1
                        sel[h + 1] = v
                else:  # quickselect of index kk, branch-free (Lomuto) partitions
                    left = 0
                    right = cnt - 1
                    while right > left:
                        mid = (left + right) // 2  # median of three goes to sel[right]
                        if sel[mid] < sel[left]:
                            sel[mid], sel[left] = sel[left], sel[mid]
                        if sel[right] < sel[left]:
                            sel[right], sel[left] = sel[left], sel[right]
                        if sel[mid] < sel[right]:
                            sel[right], sel[mid] = sel[mid], sel[right]
                        pivot = sel[right]
                        store = left
                        for i in range(left, right):
                            v = sel[i]
                            sel[i] = sel[store]
                            sel[store] = v
                            store += np.int64(v < pivot)
                        sel[right] = sel[store]
                        sel[store] = pivot
                        if kk < store:
                            right = store - 1
                        elif kk == store:
                            break
                        elif store == left:  # the pivot is the minimum: gather its ties
                            e = store + 1
                            for i in range(store + 1, right + 1):
                                v = sel[i]
                                sel[i] = sel[e]
                                sel[e] = v
                                e += np.int64(v <= pivot)
                            if kk < e:
                                break
                            left = e
                        else:
                            left = store + 1
                lower = sel[kk]
                if k2 != k1:  # even count: the next order statistic is the minimum above
                    upper = sel[kk + 1]
                    for i in range(kk + 2, cnt):
                        upper = min(upper, sel[i])
                    med = 0.5 * (lower + upper)
                    s = (lower / mad_constant + upper / mad_constant) * 0.5
                else:
                    med = lower
                    s = lower / mad_constant
                if fits == 0:
                    start_guess = med
                    band = band_first
                else:
                    band = min(max(3.0 * abs(med - guess) / guess, band_min), band_max)
                guess = med
                if s == 0.0:  # more than half the residuals are exactly zero: exact fit
                    converged = True
                    break
                # weights of the next fit; counts (they vectorize) of the standardized residuals
                # that moved by more than the tolerance since the last iteration and of the
                # weights that moved by more than refresh_change since the cross-products were
                # formed
                inv_s = 1.0 / s
                moved = 0
                stale = 0
                wsum = 0.0
                if norm_code == 0:
                    cs = c * s
                    for i in range(m):
                        z = r[i] * inv_s
                        moved += np.int64(abs(z - zp[i]) > tolerance)
                        zp[i] = z
                        wi = min(1.0, cs / abs(r[i]))
                        stale += np.int64(abs(wi - wref[i]) > refresh_change)
                        wt[i] = wi
                        wr[i] = wi * r[i]
                        wsum += wi
                else:
                    inv_sc = inv_s / c
                    for i in range(m):
                        z = r[i] * inv_s
                        moved += np.int64(abs(z - zp[i]) > tolerance)
                        zp[i] = z
                        u = r[i] * inv_sc
                        v = 1.0 - u * u
                        wi = v * v if abs(u) <= 1.0 else 0.0
                        stale += np.int64(abs(wi - wref[i]) > refresh_change)
                        wt[i] = wi
                        wr[i] = wi * r[i]
                        wsum += wi
                if fits > 0:
                    if (conv_code == 0 and moved == 0) or relative_done:
                        converged = True
                        break
                    if fits >= max_iterations:
                        break
                # weighted least squares in correction form, g += (Xc' W Xc)^-1 Xc' W r, with
                # the Cholesky factor of the cross-products re-formed for the first fits and
                # whenever a weight has moved by more than refresh_change since it was formed
                if fits < exact_fits or stale > 0:
                    for t in range(q):
                        acc = 0.0
                        for i in range(m):
                            acc += wt[i] * gram_rows[t, i]
                        At[t] = acc
                    for i in range(m):
                        wref[i] = wt[i]
                    t = 0
                    for k in range(p):
                        for l in range(k, p):
                            A[k, l] = At[t]
                            A[l, k] = At[t]
                            t += 1
                    ok = True
                    for k in range(p):
                        d = A[k, k]
                        for h in range(k):
                            d -= L[k, h] * L[k, h]
                        if not d > pivot_floor * A[k, k]:
                            ok = False
                            break
                        d = math.sqrt(d)
                        L[k, k] = d
                        for l in range(k + 1, p):
                            e = A[l, k]
                            for h in range(k):
                                e -= L[l, h] * L[k, h]
                            L[l, k] = e / d
                    if not ok:  # the weighted design lost rank: stop, keep the last fit
                        break
                k = 0  # Xc' W r, four columns per pass over the trials
                while k + 4 <= p:
                    a0 = 0.0
                    a1 = 0.0
                    a2 = 0.0
                    a3 = 0.0
                    for i in range(m):
                        v = wr[i]
                        a0 += v * xct[k, i]
                        a1 += v * xct[k + 1, i]
                        a2 += v * xct[k + 2, i]
                        a3 += v * xct[k + 3, i]
                    rhs[k] = a0
                    rhs[k + 1] = a1
                    rhs[k + 2] = a2
                    rhs[k + 3] = a3
                    k += 4
                while k < p:
                    acc = 0.0
                    for i in range(m):
                        acc += wr[i] * xct[k, i]
                    rhs[k] = acc
                    k += 1
                for k in range(p):
                    e = rhs[k]
                    for h in range(k):
                        e -= L[k, h] * rhs[h]
                    rhs[k] = e / L[k, k]
                for k in range(p - 1, -1, -1):
                    e = rhs[k]
                    for h in range(k + 1, p):
                        e -= L[h, k] * rhs[h]
                    rhs[k] = e / L[k, k]
                for k in range(p):
                    g[k] += rhs[k]
                mean_w = wsum / m
                fits += 1
            # H1 covariance factor at the final residuals (z = 0 everywhere when s = 0)
            inv_s = 1.0 / s if s > 0.0 else 0.0
            sum_d = 0.0
            sum_d2 = 0.0
            sum_psi2 = 0.0
            for i in range(m):
                z = r[i] * inv_s
                if norm_code == 0:
                    inside = abs(z) <= c
                    dv = 1.0 if inside else 0.0
                    ps = z if inside else math.copysign(c, z)
                else:
                    u = z / c
                    v = 1.0 - u * u
                    inside = abs(u) <= 1.0
                    dv = v * v - 4.0 * u * u * v if inside else 0.0
                    ps = z * v * v if inside else 0.0
                sum_d += dv
                sum_d2 += dv * dv
                sum_psi2 += ps * ps
            mean_d = sum_d / m
            var_d = max(sum_d2 / m - mean_d * mean_d, 0.0)
            kf = 1.0 + p / m * var_d / (mean_d * mean_d)
            factor_out[lo + j] = kf * kf * (sum_psi2 / (m - p) * s * s) / (mean_d * mean_d)
            for k in range(p):
                gamma_out[k, lo + j] = g[k]
            scale_out[lo + j] = s
            weight_out[lo + j] = mean_w
            iter_out[lo + j] = fits
            conv_out[lo + j] = converged
