"""Tile-level resume of a run's image files (mosaics, truth images, exposures).

The tiles write their sections into files laid out by :mod:`simfield.io` under a folder of the
run, ``.resume/<key>/`` (as ``<name>.inprogress``), instead of temporary files that vanish
when a run fails. ``<key>`` is a
hash of the configuration hash and the simfield version, so a changed configuration (seed,
field, ``tile_pixels``, ...) or another version never reuses what an earlier run wrote: the
folders of other keys are removed when the tiles start. After a tile's sections are written and
flushed to disk (``fsync``) the process that rendered it records the tile as done: a marker
``tile_<i>.done`` (the tile's result as JSON) written to a temporary name and renamed into
place (``os.replace``, atomic on POSIX filesystems), so a marker exists only for a tile whose
sections are all on disk. A run relaunched in the same folder with the same configuration
renders only the tiles without a marker; tiles overwrite their own sections whole, so the files
are byte for byte those of an uninterrupted run. When every tile is done the files are renamed
to their final names and the folder is removed; until then no file of the run's image set
exists under its final name.

A file layout is recorded (``files.json``, also written atomically) only after every file was
created; a folder without it (a run stopped while laying out its files) is started afresh.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np

from .io import _BITPIX, SectionFile, _create

__all__ = ["RESUME_DIR", "PART_SUFFIX", "TileLedger", "resume_key", "resumable_section_files"]

#: Folder of a run (beside its files) holding the image files being written and tile markers.
RESUME_DIR = ".resume"
#: Suffix of a file being written there (not ``.part``: a relaunch deletes ``*.part`` files,
#: :func:`simfield.sweep.remove_partial_files`, but keeps these).
PART_SUFFIX = ".inprogress"
_LAYOUT = "files.json"


def resume_key(config_hash: str, version: str) -> str:
    """Key (16 hex digits) of what a run's tiles write: its configuration hash and the simfield
    version (tiles written by other code are not reused)."""
    return hashlib.sha256(f"{config_hash} {version}".encode()).hexdigest()[:16]


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_atomic(path: Path, text: str) -> None:
    """``text`` into ``path`` through a temporary file flushed and renamed into place."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "w") as f:
        f.write(text)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


@dataclass(frozen=True)
class TileLedger:
    """Which tiles of a run are done: one marker file per tile in ``folder`` (picklable, so a
    worker process or a Dask task records its own tile)."""

    folder: Path
    files: tuple = ()  #: the files being written, flushed before a tile is recorded

    def _marker(self, i: int) -> Path:
        return self.folder / f"tile_{i:06d}.done"

    def done(self, i: int) -> bool:
        """Whether tile ``i`` was recorded as done."""
        return self._marker(i).exists()

    def result(self, i: int) -> dict:
        """The result tile ``i`` returned when it was done."""
        return json.loads(self._marker(i).read_text())

    def record(self, i: int, result: dict) -> None:
        """Flush the files to disk, then record tile ``i`` (and its JSON-able ``result``) as
        done, atomically."""
        for p in self.files:
            _fsync(Path(p))
        _write_atomic(self._marker(i), json.dumps(result, sort_keys=True))


@contextlib.contextmanager
def resumable_section_files(out: Path, items: Sequence, prov, key: str
                            ) -> Iterator[tuple[list[SectionFile], TileLedger]]:
    """:func:`simfield.io.section_files` that survives a failed run, for the tiles.

    Parameters
    ----------
    out : path
        Run folder; ``items`` are (final path inside ``out``, image specs, primary cards).
    items, prov
        As for :func:`simfield.io.section_files`.
    key : str
        :func:`resume_key` of the run.

    Yields
    ------
    (list of SectionFile, TileLedger)
        The files (in ``items`` order) and the ledger of done tiles: on a relaunch with the
        same key, the files and markers the earlier run left.

    When the block succeeds every file is renamed to its final path and the resume folder is
    removed; when it fails (a lost worker, an interruption) both stay for the next launch.
    """
    for _, specs, _ in items:  # refuse bad specs before anything is written
        for spec in specs:
            if np.dtype(spec.dtype) not in _BITPIX:
                raise ValueError(f"ImageSpec {spec.name}: dtype {np.dtype(spec.dtype)} not one "
                                 f"of {', '.join(str(d) for d in _BITPIX)}")
    out = Path(out)
    base = out.absolute() / RESUME_DIR  # absolute: the ledger goes to Dask workers
    folder = base / key
    if base.is_dir():
        for old in base.iterdir():
            if old.name != key:  # another configuration or version: never reused
                shutil.rmtree(old) if old.is_dir() else old.unlink()
    finals = [Path(p) for p, _, _ in items]
    parts = [folder / (str(p.relative_to(out)) + PART_SUFFIX) for p in finals]
    layout_path = folder / _LAYOUT
    layouts = None
    if layout_path.exists():
        saved = json.loads(layout_path.read_text())
        if saved.get("files") == [str(p.relative_to(out)) for p in finals] and all(
                p.exists() and p.stat().st_size == n for p, n in zip(parts, saved["sizes"])):
            layouts = [{k: (v[0], tuple(v[1]), v[2]) for k, v in lay.items()}
                       for lay in saved["layouts"]]
    if layouts is None:  # a first launch, or a folder left half laid out: start afresh
        if folder.exists():
            shutil.rmtree(folder)
        folder.mkdir(parents=True)
        layouts = []
        for part, (_, specs, cards) in zip(parts, items):
            part.parent.mkdir(parents=True, exist_ok=True)
            layouts.append(_create(part, specs, prov, cards))
        _write_atomic(layout_path, json.dumps({
            "files": [str(p.relative_to(out)) for p in finals],
            "sizes": [p.stat().st_size for p in parts],
            "layouts": [{k: [v[0], list(v[1]), v[2]] for k, v in lay.items()}
                        for lay in layouts]}))
    files = [SectionFile(part, final, lay) for part, final, lay in zip(parts, finals, layouts)]
    yield files, TileLedger(folder, tuple(str(p) for p in parts))
    for f in files:
        f.final.parent.mkdir(parents=True, exist_ok=True)
        os.replace(f.path, f.final)
    shutil.rmtree(folder)
    with contextlib.suppress(OSError):
        base.rmdir()  # only when empty
