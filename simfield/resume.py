"""Tile-level resume of a run's image files (mosaics, truth images, exposures).

The tiles write their sections into files laid out by :mod:`simfield.io` under a folder of the
run, ``.resume/<key>/`` (as ``<name>.part``), instead of temporary files that vanish
when a run fails (the command line's clean-up of ``*.part`` files leaves that folder alone). ``<key>`` is a
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

The folder outlives the tiles: when every tile is done and the files carry their final names,
``files_complete.json`` records their sizes, and a relaunch that finds them unchanged renders
nothing. The later stages keep what they finish there too (:class:`ResultStore`: the detection
tiles of each band), and the run removes the whole folder (:func:`remove_resume`) once it is
complete.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import pickle
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np

from .io import _BITPIX, SectionFile, _create

__all__ = ["RESUME_DIR", "PART_SUFFIX", "TileLedger", "ResultStore", "resume_key",
           "resume_folder", "remove_resume", "resumable_section_files"]

#: Folder of a run (beside its files) holding the image files being written and tile markers.
RESUME_DIR = ".resume"
#: Suffix of a file being written there (:func:`simfield.sweep.remove_partial_files` skips
#: :data:`RESUME_DIR`, so a relaunch keeps them).
PART_SUFFIX = ".part"
_LAYOUT = "files.json"
_COMPLETE = "files_complete.json"


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


def _write_atomic(path: Path, data: str | bytes) -> None:
    """``data`` into ``path`` through a temporary file flushed and renamed into place."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "wb") as f:
        f.write(data.encode() if isinstance(data, str) else data)
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


@dataclass(frozen=True)
class ResultStore:
    """Results of finished tiles of a later stage (e.g. the detection tiles of one band), kept
    in ``folder`` by the process that collects them: one pickle per tile, written atomically,
    so a relaunch reads back what an earlier launch finished. Only ever read by the run that
    wrote the folder (same configuration hash and version, :func:`resume_key`)."""

    folder: Path

    def _path(self, i: int) -> Path:
        return self.folder / f"tile_{i:06d}.pkl"

    def done(self, i: int) -> bool:
        """Whether tile ``i``'s result is kept."""
        return self._path(i).exists()

    def result(self, i: int):
        """The result kept for tile ``i``."""
        return pickle.loads(self._path(i).read_bytes())

    def record(self, i: int, result) -> None:
        """Keep tile ``i``'s (picklable) ``result``, atomically."""
        self.folder.mkdir(parents=True, exist_ok=True)
        _write_atomic(self._path(i), pickle.dumps(result, protocol=pickle.HIGHEST_PROTOCOL))


def resume_folder(out, key: str) -> Path:
    """The folder of ``out`` where a run of :func:`resume_key` ``key`` keeps what it finished
    (absolute: it is handed to Dask workers). Folders of other keys (another configuration or
    version) are removed: they are never reused."""
    base = Path(out).absolute() / RESUME_DIR
    if base.is_dir():
        for old in base.iterdir():
            if old.name != key:
                shutil.rmtree(old) if old.is_dir() else old.unlink()
    return base / key


def remove_resume(out) -> None:
    """Remove the resume folder of run folder ``out`` (once the run is complete)."""
    shutil.rmtree(Path(out) / RESUME_DIR, ignore_errors=True)


def _read(path: Path) -> dict | None:
    """A record written by :func:`_write_atomic` (JSON), or None if there is none."""
    return json.loads(path.read_text()) if path.exists() else None


def _record(names: list[str], paths: list[Path], **more) -> str:
    """The record of files ``names`` (relative to the run folder) written at ``paths``: their
    sizes (bytes), as JSON."""
    return json.dumps({"files": names, "sizes": [p.stat().st_size for p in paths], **more})


def _matches(saved: dict | None, names: list[str], paths: list[Path]) -> bool:
    """Whether record ``saved`` is of files ``names`` and ``paths`` still have its sizes."""
    return saved is not None and saved.get("files") == names and all(
        p.exists() and p.stat().st_size == n for p, n in zip(paths, saved["sizes"]))


def _layouts(saved: dict) -> list[dict]:
    """The files' layouts (extension -> (byte offset, shape, dtype)) of a layout record."""
    return [{k: (v[0], tuple(v[1]), v[2]) for k, v in lay.items()} for lay in saved["layouts"]]


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

    When the block succeeds every file is renamed to its final path and recorded as complete
    (the folder stays until :func:`remove_resume`); when it fails (a lost worker, an
    interruption) the files and markers stay for the next launch. A launch that finds the
    files complete yields them under their final names with every tile done (the block may
    rewrite the same bytes, e.g. depth cards, but renders nothing).
    """
    for _, specs, _ in items:  # refuse bad specs before anything is written
        for spec in specs:
            if np.dtype(spec.dtype) not in _BITPIX:
                raise ValueError(f"ImageSpec {spec.name}: dtype {np.dtype(spec.dtype)} not one "
                                 f"of {', '.join(str(d) for d in _BITPIX)}")
    out = Path(out)
    folder = resume_folder(out, key)
    finals = [Path(p) for p, _, _ in items]
    names = [str(p.relative_to(out)) for p in finals]
    parts = [folder / (n + PART_SUFFIX) for n in names]
    layout_path = folder / _LAYOUT
    saved = _read(layout_path)
    if saved is not None and _matches(_read(folder / _COMPLETE), names, finals):
        # an earlier launch finished them: reuse them under their final names
        yield [SectionFile(f, f, lay) for f, lay in zip(finals, _layouts(saved))], \
            TileLedger(folder)
        return
    if _matches(saved, names, parts):
        layouts = _layouts(saved)
    else:  # a first launch, or a folder left half laid out: start afresh
        if folder.exists():
            shutil.rmtree(folder)
        folder.mkdir(parents=True)
        layouts = []
        for part, (_, specs, cards) in zip(parts, items):
            part.parent.mkdir(parents=True, exist_ok=True)
            layouts.append(_create(part, specs, prov, cards))
        _write_atomic(layout_path, _record(names, parts, layouts=[
            {k: [v[0], list(v[1]), v[2]] for k, v in lay.items()} for lay in layouts]))
    files = [SectionFile(part, final, lay) for part, final, lay in zip(parts, finals, layouts)]
    yield files, TileLedger(folder, tuple(str(p) for p in parts))
    for f in files:
        _fsync(f.path)  # what the block wrote after the last tile (e.g. depth cards)
        f.final.parent.mkdir(parents=True, exist_ok=True)
        os.replace(f.path, f.final)
    _write_atomic(folder / _COMPLETE, _record(names, finals))
