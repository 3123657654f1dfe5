"""Deblending by multi-thresholding (photutils' ``deblend_sources``) in two forked processes,
with exactly the serial result.

photutils deblends the labels of a segmentation one after another, in increasing order: each
deblended source's pieces get the next free labels above the input's largest, and the result
is relabelled consecutively. Here the labels are cut into two runs of about equal area; the
second run is deblended in a forked child while this process deblends the first, each without
the final relabelling. The child's new labels are moved up by the number the first run made,
which is where the serial pass would have numbered them, and the merged image is relabelled
as photutils does (tests/test_detect.py compares the two). photutils' own multiprocessing
spawns fresh interpreters, whose start-up costs about as much as it saves on one mosaic.

Units: none (labels); ``data`` is the filtered image the segmentation was made from.
"""

from __future__ import annotations

import multiprocessing
import os
import warnings
from concurrent.futures import ProcessPoolExecutor

import numpy as np

__all__ = ["deblend", "MIN_LABELS_APART"]

#: Below this many labels to deblend the second process costs more than it saves.
MIN_LABELS_APART = 200

_JOB = None  # (data, segmentation, keyword arguments), set before forking


def _deblend(labels):
    from photutils.segmentation import deblend_sources

    data, segm, kw = _JOB
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = deblend_sources(data, segm, labels=labels, relabel=False, progress_bar=False,
                              **kw)
    return out.data, [(w.message, w.category) for w in caught]


def _deblend_apart(labels):
    """The second run, in the child: only the pixels it changed go back."""
    new, caught = _deblend(labels)
    idx = np.flatnonzero(new != _JOB[1].data)
    return idx, new.ravel()[idx], caught


def deblend(data: np.ndarray, segm, n_pixels: int, n_levels: int, contrast: float,
            processes: int = 1):
    """``photutils.segmentation.deblend_sources(data, segm, n_pixels, n_levels=n_levels,
    contrast=contrast)``, in two processes when ``processes`` > 1 and there are at least
    :data:`MIN_LABELS_APART` labels to deblend; the same segmentation either way.

    Parameters
    ----------
    data : ndarray
        Filtered image of the segmentation.
    segm : photutils.segmentation.SegmentationImage
    n_pixels, n_levels : int
    contrast : float
    processes : int
        Local processes to use (1: photutils here, in one pass).
    """
    from photutils.segmentation import SegmentationImage, deblend_sources

    global _JOB
    kw = dict(n_pixels=int(n_pixels), n_levels=int(n_levels), contrast=float(contrast))
    # photutils deblends only segments of at least 2 n_pixels pixels
    labels = segm.labels[segm.areas >= 2 * kw["n_pixels"]]
    if processes <= 1 or labels.size < MIN_LABELS_APART:
        return deblend_sources(data, segm, progress_bar=False, **kw)
    area = np.cumsum(segm.areas[segm.get_indices(labels)], dtype=float)
    cut = int(np.searchsorted(area, area[-1] / 2.0)) + 1
    first, second = labels[:cut], labels[cut:]
    _JOB = (data, segm, kw)
    try:
        from ._procs import die_with_parent

        with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("fork"),
                                 initializer=die_with_parent, initargs=(os.getpid(),)) as pool:
            apart = pool.submit(_deblend_apart, second)
            merged, caught = _deblend(first)
            idx, vals, caught2 = apart.result()
    finally:
        _JOB = None
    top = segm.max_label
    made = np.unique(merged[merged > top]).size  # labels the first run made
    merged.ravel()[idx] = vals + made
    for message, category in caught + caught2:
        warnings.warn(message, category, stacklevel=2)
    out = SegmentationImage(merged)
    out.relabel_consecutive(start_label=1)
    return out
