"""Figure conventions shared by the reports and pictures: titles naming the band and seed,
count labels on fraction plots, scale bars and N/E compasses on sky images.

Artists added here carry a ``gid`` (``"count"``, ``"scale_bar"``, ``"compass"``) so tests can
find them by inspecting the figure.
"""

from __future__ import annotations

import numpy as np

__all__ = ["run_title", "count_labels", "scale_bar", "compass", "sky_directions",
           "roll_directions", "png_bytes", "save_png"]


def run_title(what: str, band: str | None = None, seed=None) -> str:
    """``what`` followed by the band and the run's seed where known."""
    parts = [what]
    if band:
        parts.append(f"band {band}")
    if seed is not None:
        parts.append(f"seed {seed}")
    return ", ".join(parts)


def count_labels(ax, x, y, k, n, colour="k", fontsize=6, rotation=0):
    """Write ``k/n`` beside each point (x, y) of a fraction plot, to its upper right;
    ``rotation`` (deg) 90 writes them upright, one line of text wide (for points close
    together in x)."""
    upright = {"rotation": rotation, "va": "bottom"} if rotation else {}
    for xi, yi, ki, ni in zip(x, y, k, n):
        ax.annotate(f"{int(ki)}/{int(ni)}", (xi, yi), fontsize=fontsize, color=colour,
                    xytext=(2, 3), textcoords="offset points", gid="count", **upright)


def scale_bar(ax, length: float, label: str, loc: str = "lower right", colour: str = "w"):
    """A bar of ``length`` data units (e.g. pixels or arcsec) labelled ``label``."""
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    bar = AnchoredSizeBar(ax.transData, length, label, loc, pad=0.3, color=colour,
                          frameon=False, size_vertical=0, fontproperties={"size": 7})
    bar.set_gid("scale_bar")
    ax.add_artist(bar)
    return bar


def sky_directions(wcs, x: float, y: float) -> tuple[np.ndarray, np.ndarray]:
    """Unit vectors (pixel x, pixel y) towards north and east at pixel (x, y) of a celestial
    ``astropy.wcs.WCS`` (pixels 0-based)."""
    ra, dec = (float(v) for v in wcs.all_pix2world([[x, y]], 0)[0])
    d = 1.0 / 3600.0  # 1 arcsec (deg)
    p0 = np.asarray(wcs.all_world2pix([[ra, dec]], 0)[0], float)
    pn = np.asarray(wcs.all_world2pix([[ra, dec + d]], 0)[0], float)
    pe = np.asarray(wcs.all_world2pix([[ra + d / np.cos(np.deg2rad(dec)), dec]], 0)[0], float)
    n, e = pn - p0, pe - p0
    return n / np.hypot(*n), e / np.hypot(*e)


def roll_directions(roll_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """North and east unit vectors (pixel x, y) on a grid whose +y is ``roll_deg`` (deg) east of
    north and +x west of +y (:mod:`simfield.grid`)."""
    t = np.deg2rad(roll_deg)
    north = np.array([np.sin(t), np.cos(t)])
    east = np.array([-np.cos(t), np.sin(t)])
    return north, east


def compass(ax, north, east, size: float = 0.1, colour: str = "w", origin=(0.25, 0.25)):
    """N and E arrows of ``size`` (axes fraction) from ``origin`` (axes fraction).

    ``north``, ``east`` are directions in data (x, y) coordinates; an axis drawn inverted
    (east to the left by ``set_xlim(max, min)``) is accounted for."""
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    sx, sy = np.sign(x1 - x0) or 1.0, np.sign(y1 - y0) or 1.0
    for vec, lab in ((north, "N"), (east, "E")):
        v = np.array([vec[0] * sx, vec[1] * sy], float)
        v /= np.hypot(*v)
        tip = (origin[0] + size * v[0], origin[1] + size * v[1])
        ax.annotate("", xy=tip, xytext=origin, xycoords="axes fraction",
                    arrowprops={"arrowstyle": "->", "color": colour, "lw": 1.2}, gid="compass",
                    annotation_clip=False)
        ax.annotate(lab, (origin[0] + 1.35 * size * v[0], origin[1] + 1.35 * size * v[1]),
                    xycoords="axes fraction", color=colour, fontsize=8, ha="center",
                    va="center", gid="compass", annotation_clip=False)


def png_bytes(fig, dpi: int = 90) -> bytes:
    """``fig`` laid out (``tight_layout``, twice with images of fixed aspect) and drawn once
    into PNG bytes.

    The count labels (``gid="count"``) sit beside their points inside the axes, so they are
    left out of the layout: measuring every one of them cost as much as drawing the figure.
    No ``bbox_inches="tight"``: it draws the whole figure a second time only to crop it.
    ``dpi`` in dots per inch.
    """
    import io

    for ax in fig.axes:
        for t in ax.texts:
            if t.get_gid() == "count":
                t.set_in_layout(False)
    fig.tight_layout()
    if any(ax.get_aspect() != "auto" for ax in fig.axes):
        # an image's axes keeps its aspect inside the box it is given: tight_layout measures
        # its labels where the default box left it and gives it a box of another shape, which
        # moves them (a bottom row's x labels fell off the figure); the second pass measures
        # them in that box
        fig.tight_layout()
    # tight_layout leaves a placeholder layout engine, and savefig draws a figure that has
    # one twice (once to "lay it out"): the layout is done, so drop it
    fig.set_layout_engine(None)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def save_png(fig, path, dpi: int = 90) -> bytes:
    """Write ``fig`` (:func:`png_bytes`) to ``path`` atomically and close it; returns the PNG
    bytes (the reports embed them). ``dpi`` in dots per inch."""
    import matplotlib.pyplot as plt

    from .io import atomic_path

    data = png_bytes(fig, dpi=dpi)
    plt.close(fig)
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return data
