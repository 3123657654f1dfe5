"""Field-dependent PSF: aberrations that vary across the focal plane, PSFs on a grid of field
points, interpolated by a mean PSF plus a few eigen-PSFs.

Field position: ``(u, v)`` in arcsec from the field centre (the tangent point) along the scene
grid's +x (columns) and +y (rows) axes, the axes the PSF images are drawn in.

Aberration model (the two lowest field-dependent Seidel terms of a telescope's off-axis image,
Born & Wolf, Principles of Optics, sec. 5.3: field curvature and astigmatism, both growing as
the square of the field angle): at ``r = hypot(u, v)``, with ``r_c`` the half-diagonal of the
survey field, the wavefront error gains focus (Noll 4) ``corner_focus_nm (r / r_c)^2`` and
astigmatism of rms ``corner_astig_nm (r / r_c)^2`` oriented along the field radius (angle
``psi = atan2(v, u)``): Noll 6 (cos 2 theta) ``a cos 2 psi`` and Noll 5 (sin 2 theta)
``a sin 2 psi``, so the PSF stretches along or across the radius as at the edge of a real
field. The terms add to the scenario's own wavefront error (:mod:`simfield.optics.pupil`).

Interpolation: band PSFs on a ``grid x grid`` lattice of field points spanning the survey
field (corners included) are decomposed into their mean and the ``n_modes`` leading principal
components (SVD of the differences from the mean); each mode's coefficient is interpolated
between the grid points by tensor-product Lagrange polynomials (exact at the grid points,
biquadratic for grid 3; positions outside the grid are clamped to its edge). Every mode sums to
zero, so the interpolated PSF keeps unit flux at any position. A scene is convolved as
``scene (x) mean + sum_k (scene * w_k) (x) mode_k`` (:mod:`simfield.fieldconv`): each source's
light is spread by the PSF of its own position at the cost of ``n_modes`` extra FFT
convolutions per band.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..bands import Band
from ..config import TelescopeConfig

__all__ = ["FieldPSF", "field_zernike", "field_psf_model", "lagrange_weights",
           "psf_shape", "psf_at_position", "field_hdus", "shape_cards", "field_panels"]


def field_zernike(tel: TelescopeConfig, u, v, half_w: float, half_h: float) -> np.ndarray:
    """Field-dependent Noll 4, 5, 6 coefficients (nm) at field position ``(u, v)`` (arcsec).

    Parameters
    ----------
    tel : TelescopeConfig
        ``tel.field_psf`` gives the corner focus and astigmatism (nm rms).
    u, v : float or ndarray (arcsec)
        Field position along the scene grid's x and y axes from the field centre.
    half_w, half_h : float (arcsec)
        Half-width and half-height of the survey field; its corners are at ``r_c =
        hypot(half_w, half_h)``.

    Returns
    -------
    ndarray (nm), shape (3,) + shape of u
        Coefficients of Noll 4 (focus), 5 (astigmatism, sin 2 theta), 6 (cos 2 theta).
    """
    f = tel.field_psf
    u, v = np.asarray(u, dtype=float), np.asarray(v, dtype=float)
    q = (u * u + v * v) / (half_w * half_w + half_h * half_h)
    psi = np.arctan2(v, u)
    a = f.corner_astig_nm * q
    return np.stack([f.corner_focus_nm * q, a * np.sin(2 * psi), a * np.cos(2 * psi)])


def lagrange_weights(nodes: np.ndarray, t) -> np.ndarray:
    """Lagrange basis polynomials of ``nodes`` at ``t`` (clamped to the nodes' range).

    Returns
    -------
    ndarray, shape (len(nodes),) + shape of t
        ``L_i(t)``; they sum to 1 and ``L_i(nodes[j]) = delta_ij``.
    """
    nodes = np.asarray(nodes, dtype=float)
    t = np.clip(np.asarray(t, dtype=float), nodes.min(), nodes.max())
    out = []
    for i, ti in enumerate(nodes):
        w = np.ones_like(t)
        for j, tj in enumerate(nodes):
            if j != i:
                w = w * (t - tj) / (ti - tj)
        out.append(w)
    return np.stack(out)


def psf_shape(image: np.ndarray, scale_arcsec: float) -> tuple[float, float]:
    """FWHM (arcsec, :func:`simfield.optics.psf.measure_fwhm`) and ellipticity
    ``(a - b) / (a + b)`` of the adaptive-moment ellipse (GalSim HSM, ``|g|`` of
    ``observed_shape``) of a PSF image."""
    import galsim

    from .psf import measure_fwhm

    mom = galsim.hsm.FindAdaptiveMom(galsim.Image(np.ascontiguousarray(image, dtype=float),
                                                  scale=scale_arcsec))
    return measure_fwhm(image, scale_arcsec), float(mom.observed_shape.g)


@dataclass(frozen=True, eq=False)
class FieldPSF:
    """A band's PSF as a function of field position.

    Attributes
    ----------
    band : str
    scale_arcsec : float (arcsec)
        Pixel of the PSF images (the scene pixel).
    u_nodes, v_nodes : ndarray (arcsec)
        Field positions of the grid along x and y.
    mean : ndarray (dimensionless), shape (n, n)
        Mean of the grid PSFs (sums to 1).
    modes : ndarray (dimensionless), shape (k, n, n)
        Eigen-PSFs (each sums to 0).
    coeffs : ndarray (dimensionless), shape (k, len(v_nodes), len(u_nodes))
        Mode coefficients at the grid points.
    fwhm_arcsec, ellipticity : ndarray, shape (len(v_nodes), len(u_nodes))
        Of the directly computed PSF at each grid point (:func:`psf_shape`).
    """

    band: str
    scale_arcsec: float
    u_nodes: np.ndarray
    v_nodes: np.ndarray
    mean: np.ndarray
    modes: np.ndarray
    coeffs: np.ndarray
    fwhm_arcsec: np.ndarray
    ellipticity: np.ndarray

    def weight_maps(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Mode weights on the grid ``u`` (columns) x ``v`` (rows), arcsec: shape
        (k, len(v), len(u)), float32."""
        lu = lagrange_weights(self.u_nodes, u)  # (nu, ncols)
        lv = lagrange_weights(self.v_nodes, v)  # (nv, nrows)
        # sum_ji lv[j, r] coeffs[k, j, i] lu[i, c] as two matrix products (an unoptimised
        # three-operand einsum loops over every (k, j, i, r, c): seconds per tile); the large
        # one in float32, its result's type (3x faster than float64 and a cast; weights of
        # order 1 to ~1e-7)
        return lv.T.astype(np.float32) @ (self.coeffs @ lu).astype(np.float32)

    def worst_corner(self) -> tuple[float, float]:
        """Field position (u, v), arcsec, of the grid corner whose PSF is most elongated."""
        g = [(self.ellipticity[j, i], self.u_nodes[i], self.v_nodes[j])
             for j in (0, -1) for i in (0, -1)]
        _, u, v = max(g)
        return float(u), float(v)

    def at(self, u: float, v: float) -> np.ndarray:
        """The interpolated PSF (sums to 1) at field position ``(u, v)`` (arcsec)."""
        w = self.weight_maps(np.array([u]), np.array([v]))[:, 0, 0].astype(float)
        return self.mean + np.tensordot(w, self.modes, axes=1)


def field_psf_model(tel: TelescopeConfig, band: Band, scale_arcsec: float,
                    radius_arcsec: float, seed: int, half_w: float, half_h: float,
                    cache_dir: str | os.PathLike | None = None) -> FieldPSF:
    """Sampled band PSFs (``pixel_integrated=False``, the scene's kernel) on the field grid of
    ``tel.field_psf``, each from the disk cache or computed, and their mean + eigen-PSFs.

    Parameters
    ----------
    tel, band, scale_arcsec, radius_arcsec, seed
        As :func:`simfield.optics.psf.cached_band_psf` (arcsec, nm).
    half_w, half_h : float (arcsec)
        Half-width and half-height of the survey field: the grid spans it, corners included.
    cache_dir : path, optional
        PSF disk cache (default ``tel.psf.cache_dir``).
    """
    from .psf import cached_band_psf

    g = int(tel.field_psf.grid)
    un, vn = np.linspace(-half_w, half_w, g), np.linspace(-half_h, half_h, g)
    imgs, fwhm, ell = [], np.empty((g, g)), np.empty((g, g))
    done: dict[tuple, tuple] = {}  # the model is symmetric under (u, v) -> (-u, -v)
    for j, v in enumerate(vn):
        for i, u in enumerate(un):
            z = tuple(float(c) for c in np.round(field_zernike(tel, u, v, half_w, half_h), 6))
            if z not in done:
                p = cached_band_psf(tel, band, scale_arcsec, radius_arcsec, seed, cache_dir,
                                    pixel_integrated=False, field_zernike_nm=z)
                done[z] = (p.image, *psf_shape(p.image, scale_arcsec))
            imgs.append(done[z][0])
            fwhm[j, i], ell[j, i] = done[z][1:]
    x = np.stack([im.ravel() for im in imgs])
    mean = x.mean(axis=0)
    _, s, vt = np.linalg.svd(x - mean, full_matrices=False)
    k = int(tel.field_psf.n_modes)
    modes = vt[:k]
    coeffs = (x - mean) @ modes.T  # (g*g, k)
    n = imgs[0].shape[0]
    return FieldPSF(band=band.name, scale_arcsec=float(scale_arcsec), u_nodes=un, v_nodes=vn,
                    mean=mean.reshape(n, n), modes=modes.reshape(k, n, n),
                    coeffs=coeffs.T.reshape(k, g, g), fwhm_arcsec=fwhm, ellipticity=ell)


# --------------------------------------------------------------------------------------------
# in the PSF file
# --------------------------------------------------------------------------------------------
def field_hdus(model: FieldPSF, mosaic_grid) -> list:
    """HDUs ``FIELD_MODES`` (mean and eigen-PSFs) and ``FIELD_GRID`` (grid points: field
    position in arcsec and mosaic pixels, mode coefficients, FWHM, ellipticity), with the
    mosaic grid's geometry as header cards, for :func:`psf_at_position`."""
    from astropy.io import fits
    from astropy.table import Table

    cube = np.concatenate([model.mean[None], model.modes]).astype(np.float64)
    mh = fits.ImageHDU(cube, name="FIELD_MODES")
    mh.header["PIXSCALE"] = (model.scale_arcsec, "[arcsec] PSF pixel")
    mh.header["COMMENT"] = ("plane 0: mean PSF; planes 1..k: eigen-PSFs; PSF(u, v) = plane 0 + "
                            "sum_k c_k(u, v) plane k, c_k Lagrange-interpolated on FIELD_GRID")
    uu, vv = np.meshgrid(model.u_nodes, model.v_nodes)
    # field (u, v) -> mosaic pixel: u runs west (-xi), v north (eta) on the north-up scene grid
    mx, my = mosaic_grid.offsets_to_pixel(-uu, vv)
    t = Table()
    t["u_arcsec"], t["v_arcsec"] = uu.ravel(), vv.ravel()
    t["x_mosaic"], t["y_mosaic"] = np.ravel(mx), np.ravel(my)
    for k in range(model.modes.shape[0]):
        t[f"c{k + 1}"] = model.coeffs[k].ravel()
    t["fwhm_arcsec"] = model.fwhm_arcsec.ravel()
    t["ellipticity"] = model.ellipticity.ravel()
    for c in ("u_arcsec", "v_arcsec", "fwhm_arcsec"):
        t[c].unit = "arcsec"
    t["x_mosaic"].unit = t["y_mosaic"].unit = "pix"
    gh = fits.table_to_hdu(t)
    gh.name = "FIELD_GRID"
    for key, val, com in (("MOSNX", mosaic_grid.nx, "mosaic columns"),
                          ("MOSNY", mosaic_grid.ny, "mosaic rows"),
                          ("MOSSCALE", mosaic_grid.scale, "[arcsec] mosaic pixel"),
                          ("MOSROLL", mosaic_grid.roll_deg, "[deg] mosaic roll"),
                          ("NU", model.u_nodes.size, "grid points along u"),
                          ("NV", model.v_nodes.size, "grid points along v")):
        gh.header[key] = (val, com)
    gh.header["COMMENT"] = ("u, v: field position (arcsec) along the scene x (west) and y "
                            "(north) axes from the field centre")
    return [mh, gh]


def shape_cards(model: FieldPSF | None, centre_image: np.ndarray | None = None,
                scale_arcsec: float | None = None) -> list[tuple[str, object, str]]:
    """Header cards: FWHM (arcsec) and ellipticity (:func:`psf_shape`) of the PSF at the field
    centre and at the most elongated corner of the grid (with its field position). Without a
    field model (``model`` None) both are those of ``centre_image``."""
    if model is None:
        f, e = psf_shape(centre_image, scale_arcsec)
        vals = (f, e, f, e, 0.0, 0.0)
    else:
        g = model.u_nodes.size
        c = (g - 1) // 2 if g % 2 else None
        u, v = model.worst_corner()
        i = 0 if u == model.u_nodes[0] else -1
        j = 0 if v == model.v_nodes[0] else -1
        if c is None:  # no grid point at the centre: measure the interpolated PSF there
            fc, ec = psf_shape(model.at(0.0, 0.0), model.scale_arcsec)
        else:
            fc, ec = model.fwhm_arcsec[c, c], model.ellipticity[c, c]
        vals = (fc, ec, model.fwhm_arcsec[j, i], model.ellipticity[j, i], u, v)
    keys = (("FWHMCEN", "[arcsec] FWHM at the field centre"),
            ("ELLCEN", "ellipticity (a-b)/(a+b) at the field centre"),
            ("FWHMCOR", "[arcsec] FWHM at the corner CORNERU, CORNERV"),
            ("ELLCOR", "ellipticity (a-b)/(a+b) at that corner"),
            ("CORNERU", "[arcsec] corner field position along scene x"),
            ("CORNERV", "[arcsec] corner field position along scene y"))
    return [(k, round(float(x), 6), com) for (k, com), x in zip(keys, vals)]


def field_panels(models: dict, bands, half_w: float, half_h: float) -> list:
    """Panels of the field-dependent PSF for the PSF picture
    (:func:`simfield.optics.psf.cached_psf_png`'s ``field``): the bluest band's core PSF at the
    field centre and at its most elongated corner, with the field's half-width and
    half-height ``half_w``, ``half_h`` (arcsec). ``models``: band name -> :class:`FieldPSF`
    (empty: no panels); ``bands``: the run's :class:`~simfield.bands.Band` objects."""
    if not models:
        return []
    b = min(bands, key=lambda x: x.pivot_nm)
    fm = models[b.name]
    u, v = fm.worst_corner()
    return [(b.name, fm, (0.0, 0.0), (half_w, half_h)), (b.name, fm, (u, v), (half_w, half_h))]


def psf_at_position(psf_file: str | os.PathLike, x: float, y: float) -> np.ndarray:
    """The truth PSF of a run at mosaic pixel ``(x, y)`` (0-based, ``image[y, x]``).

    Parameters
    ----------
    psf_file : path
        A run's ``psf_<band>.fits``.
    x, y : float (mosaic pixels)

    Returns
    -------
    ndarray (dimensionless)
        The PSF sampled at scene-pixel centres like the file's ``PSF`` extension (pixel
        ``PIXSCALE`` arcsec, axes the scene grid's: +x west, +y north), summing to 1. Without a
        field-dependent PSF in the file: the ``PSF`` extension itself.
    """
    from astropy.io import fits
    from astropy.table import Table

    from ..grid import Grid

    with fits.open(Path(psf_file)) as hl:
        if "FIELD_MODES" not in hl:
            return np.asarray(hl["PSF"].data, dtype=float)
        cube = np.asarray(hl["FIELD_MODES"].data, dtype=float)
        h = hl["FIELD_GRID"].header
        t = Table(hl["FIELD_GRID"].data)
    nu, nv = int(h["NU"]), int(h["NV"])
    mg = Grid(nx=int(h["MOSNX"]), ny=int(h["MOSNY"]), scale=float(h["MOSSCALE"]), ra0=0.0,
              dec0=0.0, roll_deg=float(h["MOSROLL"]))
    xi, eta = mg.pixel_to_offsets(x, y)
    u_nodes = np.asarray(t["u_arcsec"]).reshape(nv, nu)[0]
    v_nodes = np.asarray(t["v_arcsec"]).reshape(nv, nu)[:, 0]
    k = cube.shape[0] - 1
    coeffs = np.stack([np.asarray(t[f"c{i + 1}"]).reshape(nv, nu) for i in range(k)])
    w = np.einsum("j,kji,i->k", lagrange_weights(v_nodes, float(eta)), coeffs,
                  lagrange_weights(u_nodes, -float(xi)))
    return cube[0] + np.tensordot(w, cube[1:], axes=1)
