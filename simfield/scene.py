"""The ideal (noiseless) sky of one band on the oversampled scene grid.

Cost grows with the number of pixels, not with sources x PSF area:

1. every source is drawn once (per mosaic tile it reaches), band-independent, as a unit-flux
   stamp of its intrinsic (or lensed) surface brightness integrated over scene pixels
   (:func:`draw_source_stamp`);
2. per band, stamps are scaled by the source's electron rate and summed into one image, or
   one window of the scene (:func:`accumulate`), which is convolved with the band's core PSF
   by FFT in tiles with overlap-add (:func:`convolve_tiled`);
3. the few sources bright enough for their diffraction spikes to matter are convolved one by
   one with the large PSF and added (:func:`add_bright`).

Images are in e-/s per scene pixel. Stamps carry 0-based scene-grid indices of their [0, 0]
pixel (see :mod:`simfield.grid` for the pixel convention).
"""

from __future__ import annotations

import functools
import hashlib
from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np
import scipy.fft as sfft

__all__ = [
    "Stamp",
    "point_stamp",
    "draw_profile_stamp",
    "draw_window",
    "supersampling",
    "supersampled_radius",
    "stamp_half_size",
    "STAMP_HALF_MAX",
    "draw_source_stamp",
    "draw_stamps",
    "accumulate",
    "convolve_tiled",
    "convolve_weighted",
    "add_bright",
    "WideKernel",
    "dominant_source",
]


@dataclass(frozen=True, eq=False)
class Stamp:
    """A source's light on a patch of the scene grid.

    Attributes
    ----------
    image : ndarray (float32)
        Flux per scene pixel for unit intrinsic flux: sums to 1 for an unlensed source and to
        the magnification for a lensed one.
    iy0, ix0 : int
        0-based scene-grid row and column of ``image[0, 0]``.
    index : int
        Row of the source in the sources table.
    bulge : ndarray (float32) or None
        A two-component galaxy's unit-flux bulge on the same pixels (``image`` then holds its
        disk); the band's light is (1 - B/T) image + B/T bulge (:meth:`weighted`).
    """

    image: np.ndarray
    iy0: int
    ix0: int
    index: int
    bulge: np.ndarray | None = None

    def weighted(self, bulge_fraction: np.ndarray | None, s=(slice(None), slice(None))):
        """The unit-flux light of the source on the part ``s`` of the stamp, given the bulge
        fraction per source row of a band (None or a one-component stamp: ``image``)."""
        if bulge_fraction is None or self.bulge is None:
            return self.image[s]
        bt = np.float32(bulge_fraction[self.index])
        return self.image[s] + bt * (self.bulge[s] - self.image[s])

    def clip(self, shape: tuple[int, int], origin: tuple[int, int] = (0, 0)):
        """(image slices, stamp slices) of the part inside an image of ``shape`` whose [0, 0]
        pixel is scene pixel ``origin`` = (row, column); None if none."""
        ny, nx = self.image.shape
        iy0, ix0 = self.iy0 - origin[0], self.ix0 - origin[1]
        y0, x0 = max(iy0, 0), max(ix0, 0)
        y1, x1 = min(iy0 + ny, shape[0]), min(ix0 + nx, shape[1])
        if y0 >= y1 or x0 >= x1:
            return None
        return ((slice(y0, y1), slice(x0, x1)),
                (slice(y0 - iy0, y1 - iy0), slice(x0 - ix0, x1 - ix0)))


def _reaches(st: Stamp, hy: int, hx: int, shape: tuple[int, int],
             origin: tuple[int, int]) -> bool:
    """True if ``st`` spread by a kernel of half-size (hy, hx) touches the image window."""
    y0, x0 = st.iy0 - hy - origin[0], st.ix0 - hx - origin[1]
    return (y0 < shape[0] and x0 < shape[1] and y0 + st.image.shape[0] + 2 * hy > 0
            and x0 + st.image.shape[1] + 2 * hx > 0)


def point_stamp(x: float, y: float, index: int) -> Stamp:
    """Unit point source at 0-based scene pixel (x, y), split bilinearly over 2x2 pixels.

    Bilinear splitting keeps the centroid exact (first moment of the four weights equals the
    position) at the price of a blur below one scene pixel, before the PSF is applied.
    """
    ix, iy = int(np.floor(x)), int(np.floor(y))
    fx, fy = x - ix, y - iy
    img = np.array([[(1 - fy) * (1 - fx), (1 - fy) * fx],
                    [fy * (1 - fx), fy * fx]], dtype=np.float32)
    return Stamp(img, iy, ix, index)


#: Largest stamp half-size (pixels) :func:`stamp_half_size` gives.
STAMP_HALF_MAX = 256


def stamp_half_size(profile, scale: float, cap: int = STAMP_HALF_MAX) -> int:
    """Half-size (pixels) of the stamp for a GalSim ``profile`` on pixels of ``scale``
    (arcsec): GalSim's good image size, at least 3 and at most ``cap``."""
    return int(np.clip(profile.getGoodImageSize(scale) // 2 + 1, 3, cap))


def supersampling(r_half_pix: float) -> int:
    """Sub-samples per pixel side needed to integrate a profile of half-light radius
    ``r_half_pix`` (pixels) over pixels: 5 below 1 pixel, 3 below 5, else 1.

    Odd counts keep a sample on the pixel centre; an even count (2) was measured to make the
    cusp of a compact n = 4 profile 13% too bright in its central pixel, while 1, 3, 6 and 10
    agree (benchmarks/bench_scale.py).
    """
    return 5 if r_half_pix < 1 else (3 if r_half_pix < 5 else 1)


#: The central (2 CUSP_RADIUS + 1)^2 pixels of every profile stamp are integrated with
#: CUSP_SAMPLES^2 samples per pixel: a Sersic cusp (n >= 2) is steep there on any scale, and
#: one sample per pixel misplaces up to 28% of the central pixel's light (n = 4,
#: r_half = 5 pixels, against GalSim's pixel-integrated drawing; tests/test_scene.py).
CUSP_SAMPLES = 9
CUSP_RADIUS = 2


def _sample(profile, n: int, scale: float, dx: float, dy: float) -> np.ndarray:
    """``profile`` sampled at the centres of n x n pixels (n odd) of ``scale`` arcsec, times
    the pixel area, centred (dx, dy) pixels from the middle pixel: GalSim's
    ``drawImage(method="no_pixel", offset=(dx, dy))``, called through GalSim's documented
    unchecked fast path (``_shift``, ``_drawReal``), since drawImage's set-up (~100 us a call)
    costs more than drawing a small stamp (tests/test_scene.py checks it against drawImage)."""
    import galsim

    h = n // 2
    img = galsim._Image(np.zeros((n, n)), galsim._BoundsI(-h, h, -h, h), _pixel_scale(scale))
    profile._shift(dx * scale, dy * scale)._drawReal(img)
    return img.array


@functools.lru_cache(maxsize=16)
def _pixel_scale(scale: float):
    import galsim

    return galsim.PixelScale(scale)


def supersampled_radius(r_half_pix: float) -> int:
    """Radius (pixels) of the stamp core that :func:`draw_profile_stamp` sub-samples:
    ceil(3 r_half) + 1, where a Sersic profile bends on the pixel scale. Outside it one sample
    per pixel centre errs by ~ I''/24 per pixel, below 1% of a light that is itself a small part
    of the flux (benchmarks/bench_scale.py compares with GalSim)."""
    return int(np.ceil(3.0 * r_half_pix)) + 1


def draw_profile_stamp(profile, x: float, y: float, scale: float, half_size: int,
                       index: int, supersample: int = 3, core_radius: int | None = None
                       ) -> Stamp:
    """Draw a unit-flux galsim profile centred at 0-based scene pixel (x, y).

    Parameters
    ----------
    profile : galsim.GSObject
        Surface-brightness profile in arcsec units.
    x, y : float (scene pixels)
        Centre of the profile.
    scale : float (arcsec/pixel)
        Scene pixel.
    half_size : int (pixels)
        The stamp is (2 half_size + 1) pixels on a side.
    supersample : int
        The profile is sampled ``supersample`` times finer and block-summed: pixel
        integration without galsim's (slow, for truncated Sersic profiles) FFT drawing.
    core_radius : int or None (pixels)
        Sub-sample only the central (2 core_radius + 1)^2 pixels and sample the rest once at
        pixel centres (None: the whole stamp); see :func:`supersampled_radius`.

    The stamp is renormalised to unit sum, so the flux a truncated profile or a finite stamp
    would lose is kept.
    """
    ix, iy = int(round(x)), int(round(y))
    dx, dy = x - ix, y - iy
    h = half_size
    # (samples per pixel side, radius in pixels), each level finer and smaller than the last
    levels = [(supersample, h)] if core_radius is None else \
        [(1, h), (supersample, int(min(max(core_radius, 0), h)))]
    levels.append((CUSP_SAMPLES, min(CUSP_RADIUS, h)))
    a, finest = None, 0
    for m, r in levels:
        if m <= finest:
            continue
        k = 2 * r + 1
        sub = _sample(profile, k * m, scale / m, dx * m, dy * m)
        if m > 1:
            sub = sub.reshape(k, m, k, m).sum(axis=(1, 3))
        if a is None:
            a = sub
        else:
            a[h - r:h + r + 1, h - r:h + r + 1] = sub
        finest = m
    a = a.astype(np.float32)
    total = a.sum()
    if total > 0:
        a /= total
    return Stamp(a, iy - half_size, ix - half_size, index)


def draw_window(profile, x: float, y: float, scale: float, iy0: int, ix0: int, ny: int,
                nx: int, index: int) -> Stamp:
    """Draw a unit-flux galsim profile centred at scene pixel (x, y) over one window only.

    For sources far larger than a tile (a cluster's diffuse light): the profile is sampled at
    the centres of the ``ny`` x ``nx`` scene pixels starting at row ``iy0``, column ``ix0``
    (surface brightness x pixel area, so each pixel holds its share of the unit flux) and not
    renormalised, so windows cut from the same profile tile it seamlessly and light outside
    every window is simply not drawn.

    Parameters
    ----------
    profile : galsim.GSObject
        Unit-flux profile in arcsec, already in the grid's (column, row) frame.
    x, y : float (scene pixels)
        Profile centre, 0-based scene-grid coordinates.
    scale : float (arcsec/pixel)
    iy0, ix0, ny, nx : int (scene pixels)
        The window.
    index : int
        Source row.
    """
    off = (x - (ix0 + (nx - 1) / 2.0), y - (iy0 + (ny - 1) / 2.0))
    img = profile.drawImage(nx=nx, ny=ny, scale=scale, method="no_pixel", offset=off).array
    return Stamp(img.astype(np.float32), iy0, ix0, index)


def draw_source_stamp(profile, x: float, y: float, scale: float, r_half_pix: float,
                      index: int, half_size: int | None = None) -> Stamp:
    """A source's unit-flux stamp with the project's sampling rules: a point source
    (``profile`` None) split over 2 x 2 pixels (:func:`point_stamp`), else the profile drawn on
    :func:`stamp_half_size` pixels, its core sub-sampled (:func:`supersampling`,
    :func:`supersampled_radius`) and its cusp finer (:data:`CUSP_SAMPLES`).

    Parameters
    ----------
    profile : galsim.GSObject or None
        In the grid's (column, row) frame, arcsec.
    x, y : float (scene pixels)
    scale : float (arcsec/pixel)
    r_half_pix : float (scene pixels)
        Half-light radius.
    index : int
        Source row.
    half_size : int or None (pixels)
        The stamp half-size if already known (None: :func:`stamp_half_size`).
    """
    if profile is None:
        return point_stamp(x, y, index)
    half = stamp_half_size(profile, scale) if half_size is None else half_size
    return draw_profile_stamp(profile, x, y, scale, half, index,
                              supersampling(r_half_pix),
                              core_radius=supersampled_radius(r_half_pix))


def draw_stamps(items: Iterable[tuple[int, object, float, float, float]], scale: float
                ) -> list[Stamp]:
    """Draw every source once with :func:`draw_source_stamp`.

    Parameters
    ----------
    items : iterable of (index, profile or None, x, y, r_half_pix)
        ``profile`` None means a point source; (x, y) and the half-light radius in scene
        pixels.
    scale : float (arcsec/pixel)
    """
    return [draw_source_stamp(p, x, y, scale, r, i) for i, p, x, y, r in items]


def accumulate(stamps: Sequence[Stamp], flux: np.ndarray, shape: tuple[int, int],
               select: np.ndarray | None = None, dtype=np.float32,
               origin: tuple[int, int] = (0, 0),
               bulge_fraction: np.ndarray | None = None) -> np.ndarray:
    """Sum ``flux[stamp.index] * stamp.image`` into an image of ``shape``.

    ``flux`` is indexed by source row (e-/s); ``select`` (bool per source row) keeps a subset;
    the image's [0, 0] pixel is scene pixel ``origin`` (row, column), so a window of the scene
    can be built from stamps in scene-grid indices. ``bulge_fraction`` (per source row, the
    band's B/T) weighs the bulge and disk of two-component stamps (:meth:`Stamp.weighted`).
    """
    out = np.zeros(shape, dtype=dtype)
    for st in stamps:
        f = flux[st.index]
        if f == 0 or (select is not None and not select[st.index]):
            continue
        cl = st.clip(shape, origin)
        if cl is None:
            continue
        g, s = cl
        out[g] += f * st.weighted(bulge_fraction, s)
    return out


#: Kernel transforms kept between calls (key: kernel bytes, FFT shape), up to this many bytes:
#: a tile's bands reuse their kernels' transforms on every tile of the same shape.
KERNEL_CACHE_BYTES = 64 * 2**20
_kernel_cache: dict = {}


def _kernel_transform(kernel: np.ndarray, real, shape: tuple[int, int], workers: int):
    """rfft2 of ``kernel`` (as ``real``) zero-padded to ``shape``, cached by content."""
    k = np.ascontiguousarray(kernel, dtype=real)
    key = (hashlib.blake2b(k.tobytes(), digest_size=16).digest(), k.shape, shape)
    kf = _kernel_cache.pop(key, None)
    if kf is None:
        # rows first, over the kernel's own rows only (rfft2 would also transform the padding)
        kf = sfft.fft(sfft.rfft(k, n=shape[1], axis=1, workers=workers), n=shape[0], axis=0,
                      workers=workers, overwrite_x=True)
    _kernel_cache[key] = kf  # newest last
    while sum(v.nbytes for v in _kernel_cache.values()) > KERNEL_CACHE_BYTES \
            and len(_kernel_cache) > 1:
        _kernel_cache.pop(next(iter(_kernel_cache)))
    return kf


def _tiling(n: int, k: int, tile: int) -> tuple[int, int]:
    """Tile length and FFT length along an axis of ``n`` pixels for a kernel of ``k``: the
    number of equal tiles (each at most ``tile`` long) whose FFTs cost least, taking the cost
    of an FFT of length L as L log L (pocketfft's scaling for its fast lengths)."""
    best = None
    for p in range(-(-n // tile), -(-n // tile) + 4):
        t = -(-n // p)
        f = sfft.next_fast_len(t + k - 1, real=True)
        cost = p * f * np.log(f)
        if best is None or cost < best[0]:
            best = (cost, t, f)
    return best[1], best[2]


def convolve_tiled(image: np.ndarray, kernel: np.ndarray, tile: int = 2048,
                   workers: int = -1) -> np.ndarray:
    """Convolve ``image`` with ``kernel`` (odd shape, centred) by FFT overlap-add in tiles.

    Output has the shape of ``image`` (``mode='same'``); flux that the kernel spreads beyond the
    image edge is lost, as on a real detector. Memory is bounded by the tile, not the image:
    the image is cut into equal tiles of at most ``tile`` x ``tile`` pixels, as many as make
    the FFTs cheapest (:func:`_tiling`), each transformed with the kernel zero-padded to a fast
    FFT length. Empty tiles are skipped. The kernel's transform is cached between calls
    (:data:`KERNEL_CACHE_BYTES`).
    """
    return convolve_weighted(image, kernel, (), (), tile, workers)


def convolve_weighted(image: np.ndarray, kernel: np.ndarray, modes: Sequence[np.ndarray],
                      weights: Sequence[np.ndarray], tile: int = 2048,
                      workers: int = -1, also: Sequence[np.ndarray] = ()):
    """``image (x) kernel + sum_k (image * weights[k]) (x) modes[k]`` (``mode='same'``) by the
    overlap-add of :func:`convolve_tiled`; the ``K + 1`` products of a tile are summed in the
    frequency domain and transformed back once. ``modes`` have the kernel's odd shape,
    ``weights`` the image's (dimensionless). With no modes this is :func:`convolve_tiled`.

    ``also``: more kernels of the same shape, each convolved with the unweighted image from
    the same forward transform of each tile (one inverse transform each, no forward); then
    the result is ``(convolution, [image (x) also[j] for each j])``, each equal to
    :func:`convolve_tiled` of the image with that kernel."""
    ky, kx = kernel.shape
    if ky % 2 == 0 or kx % 2 == 0:
        raise ValueError(f"kernel must have odd dimensions, got {kernel.shape}")
    if any(k.shape != kernel.shape for k in also):
        raise ValueError(f"kernels in also must have the kernel's shape {kernel.shape}")
    hy, hx = ky // 2, kx // 2
    ny, nx = image.shape
    ty, fy = _tiling(ny, ky, tile)
    tx, fx = _tiling(nx, kx, tile)
    # single precision when the image is: float32 FFTs are ~2x faster and err ~1e-7 of the
    # image's peak, far below any noise the scene will get
    real = np.float32 if image.dtype == np.float32 else np.float64
    kfs = [_kernel_transform(k, real, (fy, fx), workers) for k in (kernel, *modes)]
    afs = [_kernel_transform(k, real, (fy, fx), workers) for k in also]
    out = np.zeros((ny, nx), dtype=image.dtype)
    outs = [np.zeros((ny, nx), dtype=image.dtype) for _ in also]
    for y0 in range(0, ny, ty):
        for x0 in range(0, nx, tx):
            t = image[y0:y0 + ty, x0:x0 + tx]
            if not t.any():
                continue
            plain = sfft.rfft2(t, s=(fy, fx), workers=workers)
            h, w = t.shape
            for af, o in zip(afs, outs):
                _add_back(plain * af, o, y0, x0, h, w, hy, hx, fx, workers)
            spec = plain
            spec *= kfs[0]
            for kf, wt in zip(kfs[1:], weights):
                tw = t * wt[y0:y0 + ty, x0:x0 + tx].astype(image.dtype, copy=False)
                part = sfft.rfft2(tw, s=(fy, fx), workers=workers)
                part *= kf
                spec += part
            _add_back(spec, out, y0, x0, h, w, hy, hx, fx, workers)
    return (out, outs) if len(also) else out


def _add_back(spec, out, y0, x0, h, w, hy, hx, fx, workers) -> None:
    """Add the inverse transform of a tile's product ``spec`` (rows y0.., columns x0.. of
    the image, ``h`` x ``w``) into ``out``: the tile's full convolution spans output rows
    y0 - hy .. y0 + h + hy (columns likewise); only the rows inside the output are
    transformed back along x."""
    ny, nx = out.shape
    oy0, ox0 = max(y0 - hy, 0), max(x0 - hx, 0)
    oy1, ox1 = min(y0 + h + hy, ny), min(x0 + w + hx, nx)
    rows = sfft.ifft(spec, axis=0, workers=workers, overwrite_x=True)[
        oy0 - y0 + hy:oy1 - y0 + hy]
    c = sfft.irfft(rows, n=fx, axis=1, workers=workers)
    out[oy0:oy1, ox0:ox1] += c[:, ox0 - x0 + hx:ox1 - x0 + hx]


def add_bright(image: np.ndarray, stamps: Sequence[Stamp], flux: np.ndarray,
               select: np.ndarray, kernel: np.ndarray, origin: tuple[int, int] = (0, 0),
               bulge_fraction: np.ndarray | None = None, delta=None) -> None:
    """Add sources ``select``-ed (bool per source row) convolved one by one with ``kernel``.

    For the few bright sources whose diffraction spikes reach far: the large PSF is applied to
    each stamp (FFT of stamp x kernel, :class:`WideKernel`), never to the whole image. In
    place; ``image[0, 0]`` is scene pixel ``origin`` (row, column). Stamps whose spread light
    misses the image are skipped before the FFT. ``bulge_fraction``: as in :func:`accumulate`.

    ``delta(stamp)``, if given, is a small odd kernel (or None) added to the centre of
    ``kernel`` for that stamp alone (a field-dependent core, :mod:`simfield.fieldconv`): it is
    convolved on its own, small transform (the convolution is linear), so the large kernel's
    transform is shared by every stamp.
    """
    wide = WideKernel(kernel)
    hy, hx = wide.half
    for st in stamps:
        if not select[st.index] or flux[st.index] == 0:
            continue
        if not _reaches(st, hy, hx, image.shape, origin):
            continue
        light = st.weighted(bulge_fraction)
        conv = wide.full(light)
        d = delta(st) if delta is not None else None
        if d is not None:
            dy, dx = d.shape[0] // 2, d.shape[1] // 2
            part = WideKernel(d).full(light)
            conv[hy - dy:hy - dy + part.shape[0], hx - dx:hx - dx + part.shape[1]] += part
        big = Stamp(conv, st.iy0 - hy, st.ix0 - hx, st.index)
        cl = big.clip(image.shape, origin)
        if cl is None:
            continue
        g, s = cl
        image[g] += flux[st.index] * big.image[s]


class WideKernel:
    """A large odd kernel (dimensionless) and its real FFTs, kept by padded shape, for the
    full linear convolution of many stamps with it (:func:`add_bright`).

    Single precision: float32 transforms are ~2x faster and err by ~1e-7 of the stamp's peak
    (the scene's own convolution, :func:`convolve_weighted`, does the same; the small
    negatives left are clipped with the scene's); the padded shape is scipy's
    ``next_fast_len``, the kernel transformed once per shape.
    """

    #: transforms kept at most (each ~7 MB for the default 801^2 large PSF and a stamp of
    #: 500^2; stamps of many sizes would otherwise hold hundreds of MB)
    KEEP = 8

    def __init__(self, kernel: np.ndarray):
        ky, kx = kernel.shape
        if ky % 2 == 0 or kx % 2 == 0:
            raise ValueError(f"kernel must have odd dimensions, got {kernel.shape}")
        self.kernel = np.asarray(kernel, np.float32)
        self.half = (ky // 2, kx // 2)
        self._spectra: dict[tuple[int, int], np.ndarray] = {}

    def full(self, image: np.ndarray) -> np.ndarray:
        """The full convolution of ``image`` with the kernel, float32, shape ``image.shape +
        kernel.shape - 1``; ``out[hy + i, hx + j]`` is centred on ``image[i, j]``."""
        ky, kx = self.kernel.shape
        shape = (image.shape[0] + ky - 1, image.shape[1] + kx - 1)
        fshape = tuple(sfft.next_fast_len(n, real=True) for n in shape)
        spec = self._spectra.get(fshape)
        if spec is None:
            if len(self._spectra) >= self.KEEP:
                self._spectra.clear()
            spec = self._spectra[fshape] = sfft.rfft2(self.kernel, fshape, workers=1)
        prod = sfft.rfft2(np.asarray(image, np.float32), fshape, workers=1)
        prod *= spec
        return sfft.irfft2(prod, fshape, workers=1)[:shape[0], :shape[1]]


#: Stamps convolved together (as one stack per FFT shape) by :func:`dominant_source`.
_BATCH = 512


def _full_convs(imgs: list, kernel: np.ndarray, spectra: dict) -> list:
    """``scipy.signal.fftconvolve(img, kernel, mode="full")`` of each image (the forward
    transform of a float32 image in float32), the images of one FFT shape
    transformed as one stack and the kernel's transform kept in ``spectra`` (by FFT shape)
    between calls: thousands of small stamps cost one call per shape."""
    out = [None] * len(imgs)
    groups: dict = {}
    for i, img in enumerate(imgs):
        full = tuple(a + b - 1 for a, b in zip(img.shape, kernel.shape))
        fshape = tuple(sfft.next_fast_len(n, True) for n in full)
        groups.setdefault(fshape, []).append(i)
    for fshape, members in groups.items():
        ks = spectra.get(fshape)
        if ks is None:
            ks = spectra[fshape] = sfft.rfftn(kernel, fshape, axes=(0, 1))
        dtype = np.result_type(*(imgs[i] for i in members))  # float32 stamps stay float32
        stack = np.zeros((len(members),) + fshape, dtype)
        for j, i in enumerate(members):
            stack[j, :imgs[i].shape[0], :imgs[i].shape[1]] = imgs[i]
        conv = sfft.irfftn(sfft.rfftn(stack, axes=(1, 2)) * ks, fshape, axes=(1, 2))
        for j, i in enumerate(members):
            ny, nx = (a + b - 1 for a, b in zip(imgs[i].shape, kernel.shape))
            out[i] = conv[j, :ny, :nx]
    return out


def dominant_source(stamps: Sequence[Stamp], flux: np.ndarray, source_id: np.ndarray,
                    shape: tuple[int, int], kernel: np.ndarray, threshold: float,
                    origin: tuple[int, int] = (0, 0),
                    bulge_fraction: np.ndarray | None = None) -> np.ndarray:
    """Segmentation of the scene: id of the source contributing most light to each pixel.

    Each stamp times its flux is blurred with ``kernel`` (a small PSF core) and compared with
    the brightest contribution so far. Pixels where no source exceeds ``threshold`` (e-/s per
    scene pixel) get 0. Returns an int32 image of ``shape`` whose [0, 0] pixel is scene pixel
    ``origin`` (row, column). ``bulge_fraction``: as in :func:`accumulate`.
    """
    best = np.zeros(shape, dtype=np.float32)
    ids = np.zeros(shape, dtype=np.int32)
    # single precision throughout (float32 stamps and kernel): ~1e-7 of a source's peak,
    # and the inverse transforms at half the cost of double precision
    kernel = np.asarray(kernel, np.float32)
    ky, kx = kernel.shape
    hy, hx = ky // 2, kx // 2
    kmax, ksum = float(kernel.max()), float(kernel.sum())
    spectra: dict = {}  # the kernel's transform at each FFT shape the stamps need
    todo = []  # (stamp, its light in this band, flux) of the sources that may show
    for st in stamps:
        f = flux[st.index]
        if f <= 0:
            continue
        # conv <= f * min(sum(stamp) max(kernel), max(stamp) sum(kernel)): skip sources
        # that cannot reach the threshold anywhere
        img = st.weighted(bulge_fraction)
        bound = f * min(img.sum() * kmax, img.max() * ksum)
        if bound < threshold:
            continue
        if not _reaches(st, hy, hx, shape, origin):
            continue
        todo.append((st, img, f))
    for c0 in range(0, len(todo), _BATCH):
        chunk = todo[c0:c0 + _BATCH]
        convs = _full_convs([img for _, img, _ in chunk], kernel, spectra)
        for (st, _, f), conv in zip(chunk, convs):  # in stamp order: ties go to the first
            big = Stamp((f * conv).astype(np.float32), st.iy0 - hy, st.ix0 - hx, st.index)
            cl = big.clip(shape, origin)
            if cl is None:
                continue
            g, s = cl
            c = big.image[s]
            sub_best, sub_ids = best[g], ids[g]
            m = (c > sub_best) & (c >= threshold)
            sub_best[m] = c[m]
            sub_ids[m] = source_id[st.index]
    return ids
