"""Fused per-pixel loops of the detector model (numba), for :mod:`simfield.detector`, and of
the mosaic's flag counts, for :mod:`simfield.survey.drizzle`.

Each function does in one pass over the image what a chain of whole-image numpy operations
would do in several, with the same operations in the same order and the same precision
(float32 images, float32 constants; the Poisson expansion in float64), so the results equal
the numpy chains bit for bit (checked in tests/test_detector_fast.py and
tests/test_drizzle_flags_fast.py). Units are those of the
caller: e-/s per pixel for rates and slopes, (e-/s)^2 for variances.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["ipc", "cornish_fisher", "expected_rates", "calibrate", "refit", "deposit", "jumps",
           "nearest_counts", "nearest_weighted_add", "box_sum", "above", "pink_window",
           "add_readout"]

_jit = numba.njit(cache=True, nogil=True)


@_jit
def _ipc_at(img, y, x, centre, alpha):
    # one pixel of the IPC convolution, in float32 (float64 images are rounded pixel by pixel)
    ny, nx = img.shape
    v = centre * np.float32(img[y, x])
    if y > 0:
        v += alpha * np.float32(img[y - 1, x])
    if y < ny - 1:
        v += alpha * np.float32(img[y + 1, x])
    if x > 0:
        v += alpha * np.float32(img[y, x - 1])
    if x < nx - 1:
        v += alpha * np.float32(img[y, x + 1])
    return v


@_jit
def _ipc(img, centre, alpha, out):
    # _ipc_at over the image, written out: calling it per pixel, even inlined (numba
    # inline="always"), ran 25x slower (7.9 against 0.3 ms on 1272 x 1259), not vectorised
    ny, nx = img.shape
    for y in range(ny):
        for x in range(nx):
            v = centre * np.float32(img[y, x])
            if y > 0:
                v += alpha * np.float32(img[y - 1, x])
            if y < ny - 1:
                v += alpha * np.float32(img[y + 1, x])
            if x > 0:
                v += alpha * np.float32(img[y, x - 1])
            if x < nx - 1:
                v += alpha * np.float32(img[y, x + 1])
            out[y, x] = v
    return out


def ipc(img: np.ndarray, alpha: float) -> np.ndarray:
    """:func:`simfield.detector.apply_ipc` of an image in float32, in one pass (a new float32
    array); a float64 image is rounded to float32 pixel by pixel on the way, as
    ``ipc(img.astype(np.float32))`` without the copy."""
    img = np.asarray(img)
    if img.dtype != np.float64:
        img = np.asarray(img, np.float32)
    return _ipc(img, np.float32(1.0 - 4.0 * alpha), np.float32(alpha),
                np.empty(img.shape, np.float32))


@_jit
def _cornish_fisher(lam, z, small_below, lam_scale, out_scale, scaled, out):
    n_small = 0
    for y in range(lam.shape[0]):
        for x in range(lam.shape[1]):
            m32 = lam[y, x] * lam_scale if scaled else lam[y, x]
            m = np.float64(m32)
            zz = np.float64(z[y, x])
            v = m + np.sqrt(m) * zz
            v += (zz * zz - 1.0) / 6.0
            c = np.float32(max(v, 0.0))
            out[y, x] = c * out_scale if scaled else c
            if m < small_below:
                n_small += 1
    return n_small


def cornish_fisher(lam: np.ndarray, z: np.ndarray, small_below: float, lam_scale=None,
                   out_scale=None):
    """Poisson counts lam + sqrt(lam) z + (z^2 - 1) / 6, clipped at 0, as float32 (computed
    in float64), and the number of pixels with lam < ``small_below`` (which the caller
    replaces by exact counts). With ``lam_scale`` and ``out_scale``: the mean is ``lam x
    lam_scale`` and the counts come out times ``out_scale``, both in float32, as
    ``cornish_fisher(lam * lam_scale, z, small_below)[0] * out_scale`` without the copies."""
    out = np.empty(lam.shape, np.float32)
    scaled = lam_scale is not None
    n_small = _cornish_fisher(np.asarray(lam, np.float32), np.asarray(z, np.float32),
                              float(small_below), np.float32(lam_scale if scaled else 1.0),
                              np.float32(out_scale if scaled else 1.0), scaled, out)
    return out, n_small


@_jit
def _expected(rate, resp, sky, dark, f_sky, f):
    for y in range(rate.shape[0]):
        for x in range(rate.shape[1]):
            fs = sky[y, x] * resp[y, x] + dark[y, x]
            f_sky[y, x] = fs
            f[y, x] = rate[y, x] * resp[y, x] + fs


def expected_rates(rate, resp, sky, dark):
    """(f_sky, f) = (sky resp + dark, rate resp + f_sky), float32, e-/s; ``sky`` and ``dark``
    may be scalars or arrays broadcastable to ``rate``."""
    shape = rate.shape
    args = [np.broadcast_to(np.asarray(a, np.float32), shape) for a in (rate, resp, sky, dark)]
    f_sky, f = np.empty(shape, np.float32), np.empty(shape, np.float32)
    _expected(*args, f_sky, f)
    return f_sky, f


@_jit
def _calibrate(slope, dark_cal, cal, f, f_sky, rate, resp, sky, base, pb, ferr2, var, var_sky,
               bias, has_bias, art, length, has_refit, dcal, table_a, table_b, sig_f2,
               fb_pois):
    one = np.float32(1.0)
    for y in range(slope.shape[0]):
        for x in range(slope.shape[1]):
            inv = one / cal[y, x]
            if has_bias:
                art[y, x] = bias[y, x] * inv
            s = slope[y, x] - dark_cal[y, x]
            slope[y, x] = s * inv
            inv2 = inv * inv
            s_sky = sky[y, x] * resp[y, x]
            vs = pb * f_sky[y, x]
            vs += base[y, x]
            vs += ferr2 * s_sky * s_sky
            var_sky[y, x] = vs * inv2
            s_all = rate[y, x] * resp[y, x]
            s_all += s_sky
            v = pb * f[y, x]
            v += base[y, x]
            v += ferr2 * s_all * s_all
            var[y, x] = v * inv2
            if has_refit and length[y, x] >= 0:
                # a refitted pixel: no slope (sci = 0) below two groups, and the variance of
                # its run, (a sig_f2 + b pois f + dcal) / cal^2 + ferr2 (signal / cal)^2
                ln = length[y, x]
                if ln < 2:
                    slope[y, x] = np.float32(0.0)
                sig2 = s_all * s_all * inv2
                vr = (table_a[ln] * sig_f2 + table_b[ln] * fb_pois * np.float64(f[y, x])
                      + np.float64(dcal[y, x])) * np.float64(inv2) + np.float64(ferr2 * sig2)
                var[y, x] = np.float32(vr)


def calibrate(slope, dark_cal, cal, f, f_sky, rate, resp, sky, base, pb, ferr2, bias=None,
              refit=None):
    """In place: slope -> (slope - dark_cal) / cal (e-/s); returns (var, var_sky), the noise
    model pb f + base + ferr2 (signal)^2, over cal^2, at the expected rate and at the sky
    (``signal`` = rate resp + sky resp), and ``bias`` (1 / cal) (float32; None without a
    ``bias``). Scalars or broadcastable arrays, float32.

    ``refit`` = (run-length image of :func:`refit`, variance of the calibration dark dcal,
    table_a, table_b, sig_f2, pois) or None: refitted pixels get sci = 0 below two groups and
    the variance of their run, (a sig_f2 + b pois f + dcal) / cal^2 + ferr2 (signal / cal)^2
    ((e-/s)^2), a = table_a[run], b = table_b[run]."""
    shape = slope.shape
    b = [np.broadcast_to(np.asarray(a, np.float32), shape)
         for a in (dark_cal, cal, f, f_sky, rate, resp, sky, base)]
    var, var_sky = np.empty(shape, np.float32), np.empty(shape, np.float32)
    has = bias is not None
    art = np.empty(shape, np.float32) if has else np.empty((1, 1), np.float32)
    has_refit = refit is not None
    if has_refit:
        length, dcal, table_a, table_b, sig_f2, pois = refit
        dcal = np.broadcast_to(np.asarray(dcal, np.float32), shape)
    else:
        length, dcal = np.zeros((1, 1), np.int16), np.zeros((1, 1), np.float32)
        table_a = table_b = np.zeros(1)
        sig_f2 = pois = 0.0
    _calibrate(slope, *b, np.float32(pb), np.float32(ferr2), var, var_sky,
               np.asarray(bias, np.float32) if has else art, has, art, length, has_refit,
               dcal, table_a, table_b, float(sig_f2), float(pois))
    return var, var_sky, (art if has else None)


@_jit
def _refit_scan(sat_c, fw, has_sat, jump, has_when, when, f, centre, alpha, z, n, m, tg,
                full_well, table_a, table_b, sig_f2, ipc_var, poisson, slope, dq, dq_sat,
                dq_cr, dq_none, length):
    count = 0
    for y in range(f.shape[0]):
        for x in range(f.shape[1]):
            sat = has_sat and f[y, x] * sat_c >= fw
            jmp = has_when and jump[y, x]
            if not (sat or jmp):
                length[y, x] = -1
                continue
            count += 1
            n_ok = n
            if sat:
                q = min(np.float32(full_well) / (f[y, x] * np.float32(tg)), np.float32(n + 1))
                n_ok = min(max(int(np.ceil(q)) - 1, 0), n)
            kc, skip = n, 0
            if jmp:
                w = when[y, x]
                kc = w // m
                skip = 1 if w % m != 0 else 0
            # the longest clean run: before the jump, [0, min(kc, n_ok)), or after it
            la = min(kc, n_ok)
            lb = max(n_ok - (kc + skip), 0)
            ln = lb if lb > la else la
            length[y, x] = ln
            var = table_a[ln] * sig_f2 + (table_b[ln] * np.float64(f[y, x]) * ipc_var
                                           if poisson else 0.0)
            f_src = _ipc_at(f, y, x, centre, alpha) if alpha > 0 else f[y, x]
            new = np.float64(f_src) + np.sqrt(var) * np.float64(z[y, x])
            slope[y, x] = np.float32(0.0 if ln < 2 else new)
            flags = (dq_sat if n_ok < n else 0) | (dq_cr if jmp else 0) | \
                (dq_none if ln < 2 else 0)
            dq[y, x] |= flags
    return count


def refit(f, sat_factor, full_well, saturation, jump, when, alpha, z, n, m, tg, table_a,
          table_b, sig_f2, ipc_var, poisson, slope, dq, dq_bits):
    """Refit, in one scan, the slopes of the pixels that saturate (``f sat_factor >=
    full_well`` in float32, when ``saturation``) or carry a detected jump (``jump``, None:
    none) to their longest clean run of groups, in place in ``slope`` (e-/s, N(f_src, var of
    the run) from the pixel's deviate ``z``, f_src = ``ipc(f, alpha)`` at the pixel, or f
    where alpha = 0) and ``dq`` (``dq_bits`` = saturated, cosmic ray, no slope). Returns
    (number refitted, run-length image: -1 where not refitted), the latter for
    :func:`calibrate`. The loop of :func:`simfield.detector.expose`, per pixel."""
    f = np.asarray(f, np.float32)
    length = np.empty(f.shape, np.int16)
    has_when = when is not None and jump is not None
    dummy_b, dummy_i = np.zeros((1, 1), np.bool_), np.zeros((1, 1), np.int32)
    count = _refit_scan(np.float32(sat_factor), np.float32(full_well), bool(saturation),
                        jump if has_when else dummy_b, has_when,
                        when if has_when else dummy_i, f, np.float32(1.0 - 4.0 * alpha),
                        np.float32(alpha), np.asarray(z, np.float32), int(n), int(m), float(tg),
                        float(full_well), table_a, table_b, float(sig_f2), float(ipc_var),
                        bool(poisson), slope, dq, *(int(b) for b in dq_bits), length)
    return count, length


@_jit
def _deposit(cx, cy, dx, dy, q, interval, s, ny, nx, charge, when):
    # corner-major order, as the concatenated bincount this replaces summed them
    for corner in range(4):
        ox, oy = corner % 2, corner // 2
        for e in range(cx.size):
            for p in range(s.size):
                px = cx[e] + s[p] * dx[e]
                py = cy[e] + s[p] * dy[e]
                x0, y0 = np.floor(px), np.floor(py)
                fx, fy = px - x0, py - y0
                wx = fx if ox else 1 - fx
                wy = fy if oy else 1 - fy
                w = wx * wy
                xx, yy = int(x0) + ox, int(y0) + oy
                if 0 <= xx < nx and 0 <= yy < ny and w > 1e-3:
                    charge[yy, xx] += q[e] * w
                    when[yy, xx] = interval[e]


def deposit(shape, cx, cy, theta, length, q_point, interval, s):
    """Charge (e-, float64) and arrival-interval (int32, -1: none) images of straight tracks,
    each ``s.size`` points of charge ``q_point`` spread bilinearly (see
    :func:`simfield.detector._deposit`)."""
    ny, nx = shape
    charge = np.zeros(shape)
    when = np.full(shape, -1, np.int32)
    _deposit(np.asarray(cx, float), np.asarray(cy, float), length * np.cos(theta),
             length * np.sin(theta), np.asarray(q_point, float),
             np.asarray(interval, np.int64), np.asarray(s, float), ny, nx, charge, when)
    return charge, when


@_jit
def _jumps(cr_q, when_raw, spread, f, c0, tg, thr, d_int, when, hit, jump, bias):
    ny, nx = cr_q.shape
    for y in range(ny):
        for x in range(nx):
            w = when_raw[y, x]
            # IPC-spread charge arrives with its neighbour's event (only charged pixels: the
            # interval is read nowhere else)
            if w < 0 and spread and cr_q[y, x] > 0:
                if y > 0:
                    w = max(w, when_raw[y - 1, x])
                if y < ny - 1:
                    w = max(w, when_raw[y + 1, x])
                if x > 0:
                    w = max(w, when_raw[y, x - 1])
                if x < nx - 1:
                    w = max(w, when_raw[y, x + 1])
            when[y, x] = w
            h = cr_q[y, x] > 0 and w >= 0
            hit[y, x] = h
            jump[y, x] = h and cr_q[y, x] > thr * np.sqrt(c0 + f[y, x] * tg)
    # the 3 x 3 dilation of jump, as the row-wise dilation (three columns) of rows y - 1, y
    # and y + 1, kept in three row buffers
    rows = np.zeros((3, nx), np.bool_)
    for y in range(-1, ny):
        if y + 1 < ny:  # the row-wise dilation of row y + 1 into its buffer
            r = rows[(y + 1) % 3]
            for x in range(nx):
                r[x] = jump[y + 1, x] or (x > 0 and jump[y + 1, x - 1]) or \
                    (x < nx - 1 and jump[y + 1, x + 1])
        if y < 0:
            continue
        above, here = rows[(y - 1) % 3], rows[y % 3]
        below = rows[(y + 1) % 3]
        for x in range(nx):
            if not hit[y, x]:
                bias[y, x] = np.float32(0.0)
                continue
            j = here[x] or (y > 0 and above[x]) or (y < ny - 1 and below[x])
            hit[y, x] = j  # hit now holds the refitted pixels (jump or next to one)
            bias[y, x] = np.float32(0.0) if j else np.float32(np.float64(cr_q[y, x])
                                                                * d_int[when[y, x]])
    return hit


def jumps(cr_q, when_raw, spread, f, c0, tg, thr, d_int):
    """Cosmic-ray jump detection of :func:`simfield.detector.expose` in two fused passes.

    ``when_raw``: arrival interval (-1: no charge); with ``spread`` (IPC on) a pixel without
    its own event takes the latest of its four neighbours'. A pixel is hit where it has
    charge and an interval; a jump is detected where cr_q > thr sqrt(c0 + f tg) (e-, the
    noise of a group difference); hit pixels next to (3 x 3) a detected jump are refitted
    too; the others keep their charge as a slope bias cr_q D_i (e-/s). Returns (when,
    refitted bool image, bias float32 image); ``when`` is the arrival interval of the pixels
    with charge (cr_q > 0), ``when_raw`` elsewhere."""
    shape = cr_q.shape
    when = np.empty(shape, np.int32)
    hit = np.empty(shape, np.bool_)
    jump = np.empty(shape, np.bool_)
    bias = np.empty(shape, np.float32)
    refit = _jumps(np.asarray(cr_q, np.float32), np.asarray(when_raw, np.int32), bool(spread),
                   f, np.float32(c0), np.float32(tg), np.float32(thr),
                   np.asarray(d_int, np.float64), when, hit, jump, bias)
    return when, refit, bias


@_jit
def _ipc_noise(img, centre, alpha, bias, has_bias, c, z, out):
    _ipc(img, centre, alpha, out)
    for y in range(out.shape[0]):
        for x in range(out.shape[1]):
            v = out[y, x]
            if has_bias:
                v += bias[y, x]
            out[y, x] = v + c * z[y, x]
    return out


def ipc_noise(slope, alpha, bias, read_sd, z):
    """``ipc(slope, alpha) (+ bias) + read_sd z`` (float32, e-/s): the charge slope spread by
    IPC, the undetected cosmic-ray bias (or None) and the read noise, in one call."""
    slope = np.asarray(slope, np.float32)
    has_bias = bias is not None
    bias = bias if has_bias else np.zeros((1, 1), np.float32)
    return _ipc_noise(slope, np.float32(1.0 - 4.0 * alpha), np.float32(alpha), bias, has_bias,
                      np.float32(read_sd), z, np.empty(slope.shape, np.float32))


# ---------------------------------------------------------------------------- mosaic flags
@_jit
def _nearest_counts(a00, a01, a10, a11, b0, b1, dq, w, sat_bit, cr_bit, n_cover, n_good,
                    n_sat, n_cr, wsum, src, wk):
    gny, gnx = dq.shape
    ny, nx = n_cover.shape
    for y in range(ny):
        for x in range(nx):
            fx = np.floor(a00 * np.float64(x) + a01 * np.float64(y) + b0 + 0.5)
            fy = np.floor(a10 * np.float64(x) + a11 * np.float64(y) + b1 + 0.5)
            ix, iy = np.int64(fx), np.int64(fy)
            k = y * nx + x
            src[k] = -1
            wk[k] = np.float32(0.0)
            if ix < 0 or ix >= gnx or iy < 0 or iy >= gny:
                wsum[y, x] += np.float32(0.0)
                continue
            n_cover[y, x] += 1
            d = dq[iy, ix]
            if (d & sat_bit) != 0:
                n_sat[y, x] += 1
            v = w[iy, ix]
            if v > 0:
                n_good[y, x] += 1
                if (d & cr_bit) != 0:
                    n_cr[y, x] += 1
                wsum[y, x] += v
                src[k] = iy * gnx + ix
                wk[k] = v
            else:
                wsum[y, x] += np.float32(0.0)


def nearest_counts(a, b, dq, w, sat_bit: int, cr_bit: int, n_cover, n_good, n_sat, n_cr,
                   wsum):
    """One exposure's share of :class:`simfield.survey.drizzle._FlagCounter` in one pass.

    For each mosaic pixel (x, y) the exposure pixel nearest to its centre is
    ``floor(a @ (x, y) + b + 0.5)`` (``a``, ``b``: the mosaic-to-exposure affine map, pixels);
    where it lies on the exposure the pixel counts as covered, saturated on ``sat_bit`` of
    ``dq``, good where its weight ``w`` (float32, (e-/s)^-2) is positive, and a repaired cosmic
    ray where good with ``cr_bit``; ``wsum`` gains the good weights. The int16 counters and the
    float32 ``wsum`` are updated in place. Returns (flat index of the exposure pixel or -1
    where not good, its weight), for :func:`nearest_weighted_add`.
    """
    size = n_cover.size
    src, wk = np.empty(size, np.int64), np.empty(size, np.float32)
    _nearest_counts(float(a[0, 0]), float(a[0, 1]), float(a[1, 0]), float(a[1, 1]),
                    float(b[0]), float(b[1]), np.ascontiguousarray(dq),
                    np.ascontiguousarray(w, np.float32), int(sat_bit), int(cr_bit), n_cover,
                    n_good, n_sat, n_cr, wsum, src, wk)
    return src, wk


@_jit
def _weighted_add(src, wk, art, scale, acc):
    flat = art.ravel()
    out = acc.ravel()
    for k in range(src.size):
        if src[k] >= 0:
            out[k] += wk[k] * flat[src[k]] * scale
        else:
            out[k] += np.float32(0.0)


def nearest_weighted_add(src, wk, art, iscale: float, acc) -> None:
    """``acc += wk * art[nearest pixel] * iscale`` where good (float32, in place), with the
    (``src``, ``wk``) of :func:`nearest_counts`."""
    _weighted_add(src, wk, np.ascontiguousarray(art, np.float32), np.float32(iscale), acc)


# ------------------------------------------------------------------- scene on detector pixels
@_jit
def _add_row(img, modes, c, r, c0, w, first, buf, out_row):
    # out_row (=|+=) w x row r of img (+ sum_k c_k modes_k, clipped at 0, in img's type)
    # over columns c0 ... c0 + len(out_row) - 1; columns outside img count as 0.0
    nx = img.shape[1]
    lo, hi = max(c0, 0), min(c0 + out_row.size, nx)
    m = max(hi - lo, 0)
    for i in range(m):
        buf[i] = img[r, lo + i]
    for k in range(modes.shape[0]):
        ck = c[k]
        for i in range(m):
            buf[i] = buf[i] + ck * modes[k, r, lo + i]
    if modes.shape[0]:
        for i in range(m):
            t = buf[i]
            if not (t >= 0.0 or np.isnan(t)):
                buf[i] = t - t  # +0.0, as np.maximum(t, 0.0)
    for col in range(out_row.size):
        i = c0 + col - lo
        v = np.float64(buf[i]) if 0 <= i < m else 0.0
        if first:
            out_row[col] = w * v
        elif w == 1.0:
            out_row[col] += v
        else:
            out_row[col] += w * v


@_jit
def _box_rows(img, modes, c, start, n, o, f, c0, out):
    # out[k] = (1 - f) row(start + o k) + row(.. + 1) + ... + f row(.. + o): the numpy chain
    # of the rows pass (tests/test_survey.py), term by term in the same order, float64; rows
    # outside img count as 0.0 (its zero padding)
    ny = img.shape[0]
    zero = np.zeros((1, 1), img.dtype)
    nomode = np.zeros((0, 1, 1), img.dtype)
    buf = np.empty(out.shape[1], img.dtype)
    for k in range(n):
        r0 = start + o * k
        for j in range(o + 1):
            if j == o and not f > 0:
                break
            w = 1.0 - f if j == 0 else (f if j == o else 1.0)
            r = r0 + j
            if 0 <= r < ny:
                _add_row(img, modes, c, r, c0, w, j == 0, buf, out[k])
            else:
                _add_row(zero, nomode, c, 0, -1, w, j == 0, buf, out[k])


@_jit
def _box_cols(rows, n, o, f, out):
    # out[:, m] = (1 - f) rows[:, o m] + rows[:, o m + 1] + ... + f rows[:, o m + o], the
    # columns pass in the same order, cast to float32 (rows holds every column it needs)
    g = 1.0 - f
    for k in range(rows.shape[0]):
        for m in range(n):
            c0 = o * m
            s = g * rows[k, c0]
            for j in range(1, o):
                s += rows[k, c0 + j]
            if f > 0:
                s += f * rows[k, c0 + o]
            out[k, m] = np.float32(s)


def box_sum(img, y0: int, ny: int, x0: int, nx: int, o: int, fy: float, fx: float,
            modes=None, coeffs=None):
    """Sums of ``img`` over ``ny`` x ``nx`` boxes of ``o`` x ``o`` pixels whose edges start at
    the fractional row ``y0 + fy`` and column ``x0 + fx`` (float32 result, float64 sums; pixels
    outside ``img`` count as zero): the exact integral of a piecewise-constant image over
    shifted, ``o`` times larger pixels (units of ``img`` per pixel, e.g. e-/s). Equal bit for
    bit to the rows-then-columns numpy chain in float64 (tests/test_survey.py), without a
    float64 copy of the image.

    ``modes`` (K, *img.shape) and ``coeffs`` (K,), optional: the image summed is
    ``max(img + sum_k coeffs[k] modes[k], 0)``, formed pixel by pixel in the image's type
    (equal to forming it first with numpy, in that order), not stored."""
    img = np.ascontiguousarray(img)
    if modes is None or len(modes) == 0:
        modes = np.zeros((0, 1, 1), img.dtype)
        coeffs = np.zeros(0, img.dtype)
    else:
        modes = np.asarray(modes, img.dtype)
        coeffs = np.asarray(coeffs, img.dtype)
        if modes.shape[1:] != img.shape or coeffs.shape != modes.shape[:1]:
            raise ValueError(f"modes {modes.shape} and coeffs {coeffs.shape} must be (K, "
                             f"{img.shape[0]}, {img.shape[1]}) and (K,)")
    rows = np.empty((ny, o * nx + 1), np.float64)
    _box_rows(img, modes, coeffs, int(y0), int(ny), int(o), float(fy), int(x0), rows)
    out = np.empty((ny, nx), np.float32)
    _box_cols(rows, int(nx), int(o), float(fx), out)
    return out


# ------------------------------------------------------------------------- non-linearity
@_jit
def _above(img, add, factor, thresh, rows, cols, vals):
    # with rows.size == 0: count only; else fill the first n entries
    n = 0
    for y in range(img.shape[0]):
        for x in range(img.shape[1]):
            f = np.float64(img[y, x]) + add
            if not (f >= 0.0 or np.isnan(f)):
                f = 0.0
            if f * factor > thresh:
                if rows.size:
                    rows[n], cols[n], vals[n] = y, x, f
                n += 1
    return n


def above(img, add: float, factor: float, thresh: float):
    """Pixels where ``f = max(img + add, 0)`` (float64) has ``f * factor > thresh``: their
    (rows, columns) in C order, as ``np.nonzero``, and their ``f``; two passes (count, fill)
    over the image and no float64 copy of it (units: those of ``img``, e.g. e-/s; ``factor``
    converts to ``thresh``'s)."""
    img = np.ascontiguousarray(img)
    args = (float(add), float(factor), float(thresh))
    none = np.empty(0, np.int64)
    n = _above(img, *args, none, none, np.empty(0))
    rows, cols, vals = np.empty(n, np.int64), np.empty(n, np.int64), np.empty(n)
    if n:
        _above(img, *args, rows, cols, vals)
    return (rows, cols), vals


# ------------------------------------------------------------------ correlated read noise
@_jit
def _pink_window(grids, c0, width, row_len, step, s_off, y0, x0, per_col, cm, has_corr, spf,
                 out):
    inv = np.float32(1.0 / step)
    one = np.float32(1.0)
    nx = out.shape[1]
    for yy in range(out.shape[0]):
        base = (y0 + yy) * row_len - s_off
        cmy = cm[yy] if has_corr else 0.0
        xa = 0
        while xa < nx:  # the row's run of columns of one output
            c = (x0 + xa) // width
            xb = min(nx, (c + 1) * width - x0)
            g = grids[c - c0]
            odd = c % 2 == 1
            # the run's first sample, then one sample on (or back, on odd outputs) per column:
            # its grid point k and remainder r kept by counting, not by division
            u = x0 + xa - c * width
            if odd:
                u = width - 1 - u
            s = base + u
            k = s // step
            r = s - k * step
            for xx in range(xa, xb):
                w = np.float32(r) * inv
                v = g[k] * (one - w) + g[k + 1] * w
                if has_corr:
                    v = np.float32(np.float64(v) - (per_col[xx] + cmy))
                out[yy, xx] = spf * v
                if odd:
                    r -= 1
                    if r < 0:
                        r = step - 1
                        k -= 1
                else:
                    r += 1
                    if r == step:
                        r = 0
                        k += 1
            xa = xb


def pink_window(grids, c0: int, width: int, row_len: int, step: int, s_off: int, y0: int,
                x0: int, shape, per_col, cm, spf: float) -> np.ndarray:
    """The correlated read noise left in a window's slope (e-/s, float32) in one pass:
    :meth:`simfield.readout.CorrelatedNoise.window` (each output's pink grid, ``grids[c -
    c0]``, float32, of grid points ``STEP`` samples apart from sample ``s_off`` on, linearly
    interpolated at its pixels' read times y ``row_len`` + u), less the reference-pixel
    correction ``per_col[x] + cm[y]`` (float64; None: none), times ``spf`` (1/s), as
    :meth:`simfield.readout.ExposureReadout.residual` computes it with numpy."""
    out = np.empty(tuple(shape), np.float32)
    has = per_col is not None
    z = np.zeros(1)
    _pink_window(np.ascontiguousarray(grids, np.float32), int(c0), int(width), int(row_len),
                 int(step), int(s_off), int(y0), int(x0),
                 np.asarray(per_col, np.float64) if has else z,
                 np.asarray(cm, np.float64) if has else z, has, np.float32(spf), out)
    return out


@_jit
def _add_readout(sci, var, var_sky, res, v, y0, x0, n_ref, ny_det, nx_det, o_sci, o_var,
                 o_sky):
    for yy in range(sci.shape[0]):
        y = y0 + yy
        ref_row = y < n_ref or y >= ny_det - n_ref
        for xx in range(sci.shape[1]):
            x = x0 + xx
            o_sci[yy, xx] = sci[yy, xx] + res[yy, xx]
            o_var[yy, xx] = var[yy, xx] + v
            if ref_row or x < n_ref or x >= nx_det - n_ref:
                o_sky[yy, xx] = np.float32(0.0)
            else:
                o_sky[yy, xx] = var_sky[yy, xx] + v


def add_readout(sci, var, var_sky, res, v: float, y0: int, x0: int, n_ref: int, det_shape):
    """(sci + res, var + v, var_sky + v but 0 on the reference pixels, the border of ``n_ref``
    of a detector of ``det_shape``), new float32 arrays of a window whose corner is detector
    pixel (y0, x0); e-/s and (e-/s)^2."""
    shape = res.shape
    b = [np.broadcast_to(np.asarray(a, np.float32), shape) for a in (sci, var, var_sky)]
    out = [np.empty(shape, np.float32) for _ in range(3)]
    _add_readout(*b, res, np.float32(v), int(y0), int(x0), int(n_ref), int(det_shape[0]),
                 int(det_shape[1]), *out)
    return tuple(out)
