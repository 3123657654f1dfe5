"""Writing outputs: atomic files, provenance in every header, FITS and ECSV helpers.

Every file is written to a temporary name in its destination folder and renamed into place
(``os.replace`` is atomic on POSIX), so an interrupted run never leaves a half-written file
under a final name. Every file records the software version, the seed and the hash of the
resolved configuration; FITS primary headers also carry the whole resolved configuration as
HISTORY cards and ECSV files carry it in their metadata.
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from pathlib import Path
from dataclasses import dataclass, field
from typing import Any, Iterator, Sequence

import numpy as np
from astropy.io import fits
from astropy.table import Table

from . import __version__

__all__ = [
    "Provenance",
    "atomic_path",
    "write_fits",
    "write_table",
    "write_json",
    "write_text",
    "ImageSpec",
    "SectionFile",
    "section_files",
    "COMPLETE_MARKER",
]

_UMASK = os.umask(0)
os.umask(_UMASK)

#: Written last into a run directory; its presence means every output is complete.
COMPLETE_MARKER = "COMPLETE"


class Provenance:
    """What every output file records: version, seed, configuration hash and text."""

    def __init__(self, seed: int, config_hash: str, config_yaml: str):
        self.version = __version__
        self.seed = int(seed)
        self.config_hash = config_hash
        self.config_yaml = config_yaml

    def header_cards(self, full: bool = False) -> list[tuple[str, Any, str]]:
        """FITS cards (key, value, comment); ``full`` adds the configuration as HISTORY."""
        cards = [
            ("SIMFVER", self.version, "simfield version"),
            ("SIMFSEED", self.seed, "scenario seed"),
            ("SIMFHASH", self.config_hash, "SHA-256 (16 hex) of the resolved configuration"),
        ]
        if full:
            cards += [("HISTORY", "simfield config: " + line, "")
                      for line in self.config_yaml.splitlines()]
        return cards

    def meta(self) -> dict[str, Any]:
        """Metadata for ECSV/JSON outputs."""
        return {"simfield_version": self.version, "seed": self.seed,
                "config_hash": self.config_hash, "config": self.config_yaml}


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it to ``path`` if the block succeeds."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600; give the usual permissions
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _add_cards(header: fits.Header, cards) -> None:
    for key, value, comment in cards:
        if key == "HISTORY":
            header.add_history(value)
        else:
            header[key] = (value, comment)


#: Characters of a HISTORY card's text (80 less the 8 of the keyword field, FITS Standard 4.0
#: section 4.4.2.4): astropy's ``add_history`` cuts a longer text into cards of this many.
_HISTORY_CHARS = 72


def _primary_header(prov: Provenance, primary_cards) -> fits.Header:
    """The primary header of a file: the empty primary HDU's cards, the provenance (with the
    configuration as HISTORY) and ``primary_cards``.

    The same cards as :func:`_add_cards` on ``fits.PrimaryHDU().header``, but the hundreds of
    HISTORY lines are formatted here and parsed in one :meth:`fits.Header.fromstring`
    (appending them one by one costs ~25 ms a file in astropy); text that is not printable
    ASCII takes astropy's own path, which refuses it."""
    base = fits.PrimaryHDU().header
    cards = prov.header_cards(full=True)
    short = [c for c in cards if c[0] != "HISTORY"]
    history = [c[1] for c in cards if c[0] == "HISTORY"]
    _add_cards(base, short)
    if not all(v and v.isascii() and v.isprintable() for v in history):
        _add_cards(base, [("HISTORY", v, "") for v in history])
        _add_cards(base, primary_cards)
        return base
    block = "".join(f"HISTORY {v[i:i + _HISTORY_CHARS]:<{_HISTORY_CHARS}}"
                    for v in history for i in range(0, len(v), _HISTORY_CHARS))
    header = fits.Header.fromstring(base.tostring(endcard=False, padding=False) + block)
    _add_cards(header, primary_cards)
    return header


def write_fits(path, hdus: list[fits.hdu.base.ExtensionHDU], prov: Provenance,
               primary_cards: list[tuple[str, Any, str]] = ()) -> Path:
    """Write ``hdus`` after an empty primary HDU carrying provenance; atomic.

    Each extension gets the short provenance cards too.
    """
    primary = fits.PrimaryHDU(header=_primary_header(prov, primary_cards))
    for h in hdus:
        _add_cards(h.header, prov.header_cards())
    hl = fits.HDUList([primary, *hdus])
    hl.verify("exception")
    with atomic_path(path) as tmp:
        hl.writeto(tmp, overwrite=True)
    return Path(path)


def write_table(path, table: Table, prov: Provenance, fmt: str = "ascii.ecsv") -> Path:
    """Write an astropy table (ECSV by default) with provenance in its metadata; atomic."""
    table = table.copy(copy_data=False)
    table.meta.update(prov.meta())
    with atomic_path(path) as tmp:
        table.write(tmp, format=fmt, overwrite=True)
    return Path(path)


def _clean(obj):
    """JSON-ready copy: numpy scalars and arrays to Python, NaN and inf to None."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.integer, np.bool_)):
        return obj.item()
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path, data: dict, prov: Provenance | None = None) -> Path:
    """Write a JSON document (NaN written as null; a ``provenance`` entry when ``prov`` is
    given); atomic."""
    data = dict(data)
    if prov is not None:
        data["provenance"] = prov.meta()
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(_clean(data), indent=2, allow_nan=False))
    return Path(path)


def write_text(path, text: str) -> Path:
    """Write a text file atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text)
    return Path(path)


# ---------------------------------------------------------------------------------------------
# FITS images written by sections
# ---------------------------------------------------------------------------------------------
_BLOCK = 2880  # FITS logical record (bytes)
_BITPIX = {np.dtype(np.float32): -32, np.dtype(np.float64): -64, np.dtype(np.int32): 32,
           np.dtype(np.int16): 16, np.dtype(np.uint8): 8}


@dataclass(frozen=True)
class ImageSpec:
    """One image extension of a :class:`SectionFile`: name, shape (ny, nx), dtype and header.

    ``dtype`` is one of float32, float64, int32, int16, uint8 (no BZERO scaling); ``header``
    (a :class:`astropy.io.fits.Header` or a sequence of (key, value, comment)) holds WCS, BUNIT
    and other cards.
    """

    name: str
    shape: tuple[int, int]
    dtype: Any
    header: Any = ()


@dataclass(frozen=True)
class SectionFile:
    """A FITS file of image extensions laid out on disk, whose data are written by sections.

    Built by :func:`section_files`. ``path`` is the temporary file being written (renamed to
    ``final`` when complete); ``layout`` maps each extension name to (byte offset, shape,
    dtype). It pickles, so worker processes can open the same file with :meth:`array` and
    write disjoint sections through a shared memory map.
    """

    path: Path
    final: Path
    layout: dict = field(default_factory=dict)

    def array(self, name: str, mode: str = "r+") -> np.memmap:
        """Memory map of extension ``name`` (big-endian, FITS order); write sections into it."""
        offset, shape, dtype = self.layout[name]
        return np.memmap(self.path, dtype=np.dtype(dtype).newbyteorder(">"), mode=mode,
                         offset=offset, shape=tuple(shape))


def _extension_header(spec: ImageSpec, prov: Provenance) -> fits.Header:
    hdu = fits.ImageHDU(np.zeros((1, 1), np.dtype(spec.dtype)), name=spec.name)
    h = hdu.header
    h["NAXIS1"] = int(spec.shape[1])
    h["NAXIS2"] = int(spec.shape[0])
    extra = spec.header
    if isinstance(extra, fits.Header):
        for card in extra.cards:
            if card.keyword not in h or card.keyword in ("COMMENT", "HISTORY"):
                h.append(card)
            else:
                h[card.keyword] = (card.value, card.comment)
    else:
        _add_cards(h, extra)
    _add_cards(h, prov.header_cards())
    return h


def _create(path: Path, specs: Sequence[ImageSpec], prov: Provenance, primary_cards) -> dict:
    """Write headers and reserve (zero-filled, sparse) data blocks; return the layout."""
    layout = {}
    with open(path, "wb") as f:
        f.write(_primary_header(prov, primary_cards).tostring().encode("ascii"))
        for spec in specs:
            f.write(_extension_header(spec, prov).tostring().encode("ascii"))
            dtype = np.dtype(spec.dtype)
            layout[spec.name] = (f.tell(), tuple(int(n) for n in spec.shape), dtype.str)
            nbytes = int(np.prod(spec.shape)) * dtype.itemsize
            f.seek(f.tell() + -(-nbytes // _BLOCK) * _BLOCK)
        f.truncate()
    return layout


@contextlib.contextmanager
def section_files(items: Sequence[tuple[str | os.PathLike, Sequence[ImageSpec],
                                        list[tuple[str, Any, str]]]],
                  prov: Provenance) -> Iterator[list[SectionFile]]:
    """Create FITS image files whose data are then written section by section.

    Parameters
    ----------
    items : sequence of (path, specs, primary_cards)
        Each final path, its image extensions (:class:`ImageSpec`) and extra primary cards.
    prov : Provenance
        Written into the primary header (with the configuration) and every extension.

    Yields
    ------
    list of SectionFile
        One per item, in order; write with ``f.array(name)[rows, cols] = ...``.

    Every file is laid out under a temporary name beside its final path, so memory never holds
    a whole image; when the block succeeds all files are flushed and renamed into place, and if
    it fails none is left (the temporary files are removed), as with :func:`atomic_path`.
    """
    for _, specs, _ in items:  # refuse bad specs before anything is written
        for spec in specs:
            if np.dtype(spec.dtype) not in _BITPIX:
                raise ValueError(f"ImageSpec {spec.name}: dtype {np.dtype(spec.dtype)} not one "
                                 f"of {', '.join(str(d) for d in _BITPIX)}")
    files: list[SectionFile] = []
    try:
        for path, specs, cards in items:
            path = Path(path)
            path.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
            os.close(fd)
            os.chmod(tmp, 0o666 & ~_UMASK)
            try:
                layout = _create(Path(tmp), specs, prov, cards)
            except BaseException:
                os.unlink(tmp)
                raise
            files.append(SectionFile(Path(tmp), path, layout))
        yield files
        for f in files:
            os.replace(f.path, f.final)
    finally:
        for f in files:
            if f.path.exists():
                f.path.unlink()
