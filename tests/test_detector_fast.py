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
