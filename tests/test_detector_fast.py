"""The fast paths of simfield.detector against their references: the closed-form longest clean
run against the group-by-group scan it replaces, and the shifted-slice morphology against
scipy.ndimage (the reference library)."""

import numpy as np
from numpy.testing import assert_array_equal
from scipy import ndimage

from simfield import detector as dt


def test_closed_form_runs_equal_the_group_scan():
    """_best_runs_one_break gives the start and length of _best_runs for every combination of
    saturation cut, jump group and spoiled group (exhaustive for 8 groups)."""
    n = 8
    cases = [(n_ok, kc, skip) for n_ok in range(n + 1) for kc in range(n + 1)
             for skip in (False, True) if not (kc == n and skip)]
    n_ok, kc, skip = (np.array(v) for v in zip(*cases))
    k = np.arange(n)
    usable = k[None, :] < n_ok[:, None]
    brk = np.zeros_like(usable)
    rows = np.nonzero(kc < n)[0]
    brk[rows, kc[rows]] = True
    usable[rows[skip[rows]], kc[rows[skip[rows]]]] = False
    start, length = dt._best_runs(usable, brk)
    s2, l2 = dt._best_runs_one_break(n_ok, kc, skip)
    assert_array_equal(length, l2)
    assert_array_equal(start[length > 0], s2[length > 0])


def test_shifted_slice_morphology_equals_ndimage():
    """Cross and square binary dilation and the cross grey dilation (mode reflect) equal
    scipy.ndimage's, edges included."""
    rng = np.random.default_rng(5)
    a = rng.random((37, 53)) < 0.05
    a[0, 0] = a[-1, 7] = a[5, -1] = True
    assert_array_equal(dt._dilate_cross(a), ndimage.binary_dilation(a))
    assert_array_equal(dt._dilate_square(a),
                       ndimage.binary_dilation(a, structure=np.ones((3, 3), bool)))
    w = np.where(a, rng.integers(0, 32, a.shape), -1)
    cross = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], bool)
    assert_array_equal(dt._max_cross(w), ndimage.grey_dilation(w, footprint=cross))


def test_fused_pixel_loops_equal_the_numpy_chains():
    """simfield.pixelops repeats numpy chains in one pass: the same numbers bit for bit.
    IPC against detector.apply_ipc; the Cornish-Fisher counts against the formula in float64;
    the jump pass against scipy.ndimage (3 x 3 dilation, cross grey dilation, reflect)."""
    from simfield import pixelops

    rng = np.random.default_rng(3)
    img = rng.exponential(5.0, (37, 41)).astype(np.float32)
    assert_array_equal(pixelops.ipc(img, 0.017), dt.apply_ipc(img, 0.017))
    lam = rng.uniform(0.0, 400.0, img.shape).astype(np.float32)
    z = rng.standard_normal(img.shape).astype(np.float32)
    out, n_small = pixelops.cornish_fisher(lam, z, 20.0)
    l64, z64 = lam.astype(float), z.astype(float)
    ref = np.maximum(l64 + np.sqrt(l64) * z64 + (z64 * z64 - 1.0) / 6.0, 0.0)
    assert_array_equal(out, ref.astype(np.float32))
    assert n_small == int((lam < 20.0).sum())
    # jumps: sparse charge with arrival intervals, IPC-spread
    cr = np.zeros(img.shape, np.float32)
    when_raw = np.full(img.shape, -1, np.int32)
    hits = rng.random(img.shape) < 0.05
    cr[hits] = rng.lognormal(6.0, 1.5, hits.sum())
    when_raw[hits] = rng.integers(0, 32, hits.sum())
    cr = dt.apply_ipc(cr, 0.02)
    d_int = rng.uniform(0.0, 1e-3, 32)
    when, refit, bias = pixelops.jumps(cr, when_raw, True, img, 60.0, 10.0, 5.0, d_int)
    w_ref = np.where(when_raw >= 0, when_raw,
                     ndimage.grey_dilation(when_raw, footprint=ndimage.generate_binary_structure(2, 1),
                                           mode="reflect"))
    charged = cr > 0  # the interval is the neighbours' only where there is charge
    assert_array_equal(when[charged], w_ref[charged])
    assert_array_equal(when[~charged], when_raw[~charged])
    hit = charged & (w_ref >= 0)
    jump = hit & (cr > np.float32(5.0) * np.sqrt(np.float32(60.0) + img * np.float32(10.0)))
    jump |= hit & ndimage.binary_dilation(jump, structure=np.ones((3, 3)))
    assert_array_equal(refit, jump)
    faint = hit & ~jump
    ref_bias = np.zeros(img.shape, np.float32)
    ref_bias[faint] = cr[faint] * d_int[w_ref[faint]]
    assert_array_equal(bias, ref_bias)


def test_above_equals_the_numpy_chain():
    """pixelops.above (the non-linearity's high-fluence pixels) gives np.nonzero's indices
    and the float64 rates of max(img + add, 0) exactly, negatives clipped."""
    from simfield.pixelops import above

    rng = np.random.default_rng(5)
    img = rng.normal(5.0, 20.0, (300, 200)).astype(np.float32)
    f = np.maximum(np.asarray(img, float) + 1.5, 0.0)
    idx = np.nonzero(f * 30.0 > 600.0)
    got_idx, got_f = above(img, 1.5, 30.0, 600.0)
    assert 0 < idx[0].size < img.size
    np.testing.assert_array_equal(got_idx[0], idx[0])
    np.testing.assert_array_equal(got_idx[1], idx[1])
    np.testing.assert_array_equal(got_f, f[idx])
    (r, c), v = above(img, -1e9, 1.0, 0.0)  # everything clipped to 0: nothing above
    assert r.size == c.size == v.size == 0
