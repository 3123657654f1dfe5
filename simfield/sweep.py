"""Parameter sweeps: per-job seeds, resuming an interrupted sweep, one table of the results.

A sweep is a Hydra multirun (``simfield -m ...`` or an ``experiment/`` preset); every job writes
one run directory ``<hydra.sweep.dir>/<job number>`` holding Hydra's ``.hydra/overrides.yaml``,
the run's outputs, ``summary.json`` and, last, the ``COMPLETE`` marker
(:data:`simfield.io.COMPLETE_MARKER`).

Seeds
    In a single run the seed is used as given. In a multirun job the effective seed is
    :func:`job_seed` of the configured seed and the job's task overrides, so that jobs differing
    in any parameter are independent realisations, and the same job always gets the same seed
    whatever the launcher, the job number or the order of the overrides. Each job records its
    effective seed and a command re-running it alone in ``job.json`` (:func:`write_job_record`).

Resume
    Relaunch the same sweep with the same ``hydra.sweep.dir=DIR``: a job whose directory holds
    a complete run of the same configuration is skipped (:func:`should_skip`), any other one
    (interrupted: no marker; or a different configuration) is run again from scratch.

Collect
    :func:`collect` reads every job's overrides and ``summary.json`` into one astropy Table;
    ``simfield-collect SWEEP_DIR`` (:func:`collect_main_args`) writes it as ``sweep.ecsv`` with a
    PNG plot of each headline metric against each swept parameter.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import logging
import math
import re
import shlex
import sys
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Iterable

import numpy as np
from astropy.table import Column, MaskedColumn, Table

from ._argparse import ArgError, DefaultsHelpFormatter, OneLineParser, check_out_folder
from .io import COMPLETE_MARKER, atomic_path, write_json

__all__ = [
    "SEED_MODULUS",
    "EXECUTION_KEYS",
    "JOB_RECORD",
    "HEADLINE_METRICS",
    "JobPlan",
    "job_seed",
    "rerun_command",
    "plan_job",
    "write_job_record",
    "read_marker",
    "is_complete",
    "should_skip",
    "remove_partial_files",
    "find_jobs",
    "collect",
    "plot_sweep",
    "collect_main_args",
]

log = logging.getLogger("simfield")

#: Effective seeds lie in [0, SEED_MODULUS): non-negative and representable as a signed 32-bit
#: integer (FITS ``J`` cards, any downstream tool).
SEED_MODULUS = 2**31

#: Overrides that change how a job runs, not what it simulates: left out of the job seed, so
#: e.g. re-running a sweep with ``workers=1`` on another machine gives the same fields.
EXECUTION_KEYS = ("workers", "telescope.psf.cache_dir", "limits.disk_gb", "limits.memory_gb")

#: Per-job record written into each multirun job directory.
JOB_RECORD = "job.json"

#: Leaf names of ``summary.json`` entries plotted by ``simfield-collect`` (all numeric entries
#: go into the table). Per-band entries are drawn as one line per band.
HEADLINE_METRICS = (
    "measured_5sigma", "predicted_5sigma", "m50", "m90", "purity_at_reference_mag",
    "completeness_all", "purity_all", "n_detections", "n_sources", "n_galaxies", "n_stars",
    "n_images", "n_multiply_imaged",
)

# summary.json entries that are not results (strings and lists are left out anyway)
_SKIP_SUMMARY = {"provenance"}


# --------------------------------------------------------------------------------------------
# seeds
# --------------------------------------------------------------------------------------------
def _parse(override: str):
    from hydra.core.override_parser.overrides_parser import OverridesParser

    try:
        return OverridesParser.create().parse_override(override)
    except Exception:  # not Hydra grammar (hand-written file): treated as opaque text
        return None


def _override_key(override: str) -> str:
    """Config key or group of an override, without ``+``, ``++`` or ``~``."""
    o = _parse(override)
    if o is not None:
        return o.key_or_group
    return override.split("=", 1)[0].strip().lstrip("+~")


def _is_hydra_key(key: str) -> bool:
    return key == "hydra" or key.startswith(("hydra.", "hydra/"))


def _seed_overrides(overrides: Iterable[str]) -> list[str]:
    """Overrides that define a job for seeding: no ``hydra*``, ``seed`` or
    :data:`EXECUTION_KEYS` (nor ``cluster``); canonical text, sorted."""
    out = []
    for s in overrides:
        o = _parse(s)
        key = o.key_or_group if o is not None else _override_key(s)
        if (_is_hydra_key(key) or key == "seed" or key in EXECUTION_KEYS
                or key.split(".")[0] == "cluster"):  # the cluster group and its keys
            continue
        if o is not None and not o.is_delete():
            s = f"{o.get_key_element()}={o.get_value_element_as_str()}"
        out.append(s.strip())
    return sorted(out)


def job_seed(base_seed: int, overrides: list[str]) -> int:
    """Seed of one multirun job, derived from the configured seed and the job's overrides.

    Parameters
    ----------
    base_seed : int
        The configured ``seed`` of the job (itself possibly swept: ``seed=1,2,3``).
    overrides : list of str
        The job's task overrides (Hydra's ``hydra.overrides.task``). ``hydra.*`` / ``hydra/*``
        overrides (launcher, sweep directory ...), :data:`EXECUTION_KEYS` and ``seed`` itself
        are ignored; the rest are
        put in canonical form (``key=value`` as Hydra's parser prints it) and sorted, so their
        order and spelling do not matter.

    Returns
    -------
    int
        ``int(SHA-256(base_seed, sorted overrides)[:8 bytes]) mod 2**31``.
    """
    if isinstance(base_seed, bool) or not isinstance(base_seed, (int, np.integer)) \
            or base_seed < 0:
        raise ValueError(f"base_seed must be a non-negative integer, got {base_seed!r}")
    text = "\n".join([f"seed={int(base_seed)}", *_seed_overrides(overrides)])
    digest = hashlib.sha256(text.encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") % SEED_MODULUS


def rerun_command(seed: int, overrides: list[str], prog: str = "simfield") -> str:
    """One shell line that re-runs a multirun job alone with its effective ``seed``.

    ``hydra.mode=RUN`` makes it a single run even when an experiment preset asks for a
    multirun (a single run uses its seed as given); ``hydra.*`` overrides of the sweep are
    dropped, every other override is kept in its original order.
    """
    keep = [s for s in overrides
            if not _is_hydra_key(_override_key(s)) and _override_key(s) != "seed"]
    return shlex.join([prog, "hydra.mode=RUN", f"seed={int(seed)}", *keep])


@dataclass(frozen=True)
class JobPlan:
    """What a Hydra task does with one job.

    Attributes
    ----------
    scenario : Scenario
        The scenario to run, carrying the effective seed.
    base_seed : int
        The configured seed.
    skip : bool
        The job's directory already holds a complete run of this scenario (resume).
    multirun : bool
    overrides : tuple of str
        The job's task overrides.
    rerun : str
        Shell command re-running this job alone.
    """

    scenario: Any
    base_seed: int
    skip: bool
    multirun: bool
    overrides: tuple[str, ...]
    rerun: str


def plan_job(scenario, overrides: list[str], run_dir, multirun: bool) -> JobPlan:
    """Effective seed and skip decision of one job (the rule of this module, in one place).

    Parameters
    ----------
    scenario : Scenario
        The validated scenario composed for the job (seed as configured).
    overrides : list of str
        The job's task overrides (``HydraConfig.get().overrides.task``).
    run_dir : path
        The job's output directory.
    multirun : bool
        Whether Hydra runs in MULTIRUN mode. Single runs keep their seed and are never
        skipped.
    """
    from .config import config_hash

    base = int(scenario.seed)
    if not multirun:
        return JobPlan(scenario, base, False, False, tuple(overrides),
                       rerun_command(base, list(overrides)))
    sc = replace(scenario, seed=job_seed(base, list(overrides)))
    skip = should_skip(run_dir, config_hash(sc))
    return JobPlan(sc, base, skip, True, tuple(overrides), rerun_command(sc.seed, list(overrides)))


def write_job_record(run_dir, plan: JobPlan) -> Path:
    """Write ``job.json`` (configured and effective seed, overrides, re-run command); atomic."""
    return write_json(Path(run_dir) / JOB_RECORD, {
        "base_seed": plan.base_seed, "seed": int(plan.scenario.seed),
        "multirun": plan.multirun, "overrides": list(plan.overrides), "rerun": plan.rerun,
        "seed_rule": "multirun: job_seed(base_seed, overrides); single run: seed as given",
    })


# --------------------------------------------------------------------------------------------
# resume
# --------------------------------------------------------------------------------------------
def read_marker(run_dir) -> dict | None:
    """Contents of a run's ``COMPLETE`` marker, or None when there is none.

    The first line reads ``simfield <version> seed <seed> config <hash>``; any further
    non-empty line names a file (relative to the run directory) that the run wrote.

    Returns
    -------
    dict or None
        ``{"version": str|None, "seed": int|None, "config": str|None, "files": [str]}``.
    """
    path = Path(run_dir) / COMPLETE_MARKER
    if not path.is_file():
        return None
    try:
        lines = path.read_text().splitlines()
    except (OSError, UnicodeDecodeError):
        return None
    head = lines[0].split() if lines else []
    info: dict = {"version": None, "seed": None, "config": None,
                  "files": [ln.strip() for ln in lines[1:] if ln.strip()]}
    if len(head) >= 2 and head[0] == "simfield":
        info["version"] = head[1]
    for key, val in zip(head, head[1:]):
        if key == "seed":
            try:
                info["seed"] = int(val)
            except ValueError:
                pass
        elif key == "config":
            info["config"] = val
    return info


def is_complete(run_dir) -> bool:
    """True when ``run_dir`` holds the ``COMPLETE`` marker and every file it lists exists."""
    info = read_marker(run_dir)
    if info is None:
        return False
    return all((Path(run_dir) / f).exists() for f in info["files"])


def should_skip(run_dir, config_hash: str | None = None) -> bool:
    """Whether a (relaunched) job may skip ``run_dir`` because its run is already complete.

    Parameters
    ----------
    run_dir : path
        The job's output directory.
    config_hash : str, optional
        :func:`simfield.config.config_hash` of the scenario about to run. When given, a
        complete run of a *different* configuration (the same job number in a changed sweep)
        is not skipped but redone.
    """
    if not is_complete(run_dir):
        return False
    if config_hash is None:
        return True
    recorded = read_marker(run_dir)["config"]
    if recorded is not None and recorded != config_hash:
        log.warning("%s: complete run of another configuration (%s, now %s): running again",
                    run_dir, recorded, config_hash)
        return False
    return True


def remove_partial_files(run_dir) -> list[Path]:
    """Delete temporary ``*.part`` files a killed run left behind (never a final file, and
    never the sections kept for a relaunch in the run's resume folder,
    :data:`simfield.resume.RESUME_DIR`).

    Only call this when no other process is writing into ``run_dir``.
    """
    from .resume import RESUME_DIR

    run_dir = Path(run_dir)
    gone = []
    if run_dir.is_dir():
        for p in sorted(run_dir.rglob("*.part")):
            if p.is_file() and RESUME_DIR not in p.relative_to(run_dir).parts:
                p.unlink()
                gone.append(p)
    return gone


# --------------------------------------------------------------------------------------------
# collect
# --------------------------------------------------------------------------------------------
def _natural_key(path: str):
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", path)]


def find_jobs(sweep_dir) -> list[Path]:
    """Job directories under ``sweep_dir``: those with ``.hydra/overrides.yaml`` or a marker.

    Hidden directories (``.submitit``, ``.hydra``) are not searched; the order is natural
    (job 2 before job 10).
    """
    root = Path(sweep_dir)
    found = set()
    for p in root.rglob("overrides.yaml"):
        if p.parent.name == ".hydra":
            found.add(p.parent.parent)
    for p in root.rglob(COMPLETE_MARKER):
        found.add(p.parent)
    rel = {}
    for d in found:
        r = d.relative_to(root)
        if any(part.startswith(".") for part in r.parts):
            continue
        rel[d] = r.as_posix()
    return sorted(rel, key=lambda d: _natural_key(rel[d]))


def _read_overrides(job_dir: Path) -> list[str]:
    path = job_dir / ".hydra" / "overrides.yaml"
    if not path.is_file():
        return []
    import yaml

    try:
        data = yaml.safe_load(path.read_text())
    except yaml.YAMLError:
        return []
    return [str(s) for s in data] if isinstance(data, list) else []


def _override_items(overrides: list[str]) -> dict[str, Any]:
    """{key: typed value} of a job's overrides (``hydra*`` and deletions left out)."""
    items = {}
    for s in overrides:
        o = _parse(s)
        if o is None:
            if "=" not in s:
                continue
            k, v = s.split("=", 1)
            k = k.strip().lstrip("+~")
            if not _is_hydra_key(k):
                items[k] = v.strip()
            continue
        if _is_hydra_key(o.key_or_group) or o.is_delete():
            continue
        v = o.value()
        if isinstance(v, (list, dict)) or v is None:
            v = o.get_value_element_as_str()
        items[o.key_or_group] = v
    return items


def _flatten(d: dict, prefix: tuple[str, ...] = ()) -> dict[tuple[str, ...], float]:
    """Numeric leaves of a nested summary: {path: value}; None (JSON null) becomes NaN. The
    reason a limit is not quoted (``*_reason``, a string) is kept beside it."""
    out = {}
    for k, v in d.items():
        if k in _SKIP_SUMMARY:
            continue
        path = prefix + (str(k),)
        if isinstance(v, dict):
            out.update(_flatten(v, path))
        elif isinstance(v, bool):
            out[path] = float(v)
        elif isinstance(v, (int, float)):
            out[path] = v
        elif v is None:
            out[path] = math.nan
        elif isinstance(v, str) and str(k).endswith("_reason"):
            out[path] = v
    return out


def _read_summary(job_dir: Path) -> dict:
    return _read_json(job_dir / "summary.json")


def _read_json(path: Path) -> dict:
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _metric_name(path: tuple[str, ...]) -> str:
    if path == ("seed",):
        return "job_seed"
    return ".".join(path)


def _column(values: list, name: str):
    """A (masked where missing) column: int, float, or str as the values allow."""
    present = [v for v in values if v is not None]
    mask = [v is None for v in values]
    if present and all(isinstance(v, (int, np.integer)) and not isinstance(v, bool)
                       for v in present):
        data = [0 if v is None else int(v) for v in values]
        dtype = np.int64
    elif all(isinstance(v, (int, float, np.number)) and not isinstance(v, bool)
                         for v in present):
        data = [math.nan if v is None else float(v) for v in values]
        dtype = np.float64
    else:
        data = ["" if v is None else str(v) for v in values]
        dtype = str
    if any(mask):
        return MaskedColumn(data, name=name, mask=mask, dtype=dtype)
    return Column(data, name=name, dtype=dtype)


def collect(sweep_dir, include_incomplete: bool = False) -> Table:
    """One row per job of a sweep: its overrides and the numbers of its ``summary.json``.

    Parameters
    ----------
    sweep_dir : path
        Hydra's sweep directory (``hydra.sweep.dir``).
    include_incomplete : bool
        Also give rows to jobs without the ``COMPLETE`` marker (their metrics masked).

    Returns
    -------
    astropy.table.Table
        Columns: ``job`` (directory relative to ``sweep_dir``), ``complete``, ``rerun`` (the
        job's re-run command from ``job.json``, when recorded), one column per
        override key (e.g. ``survey.n_exposures``, ``lens``; the configured ``seed`` when it was
        overridden), ``job_seed`` (the seed the job actually used, from its summary) and one
        column per numeric summary entry, named by its path joined with dots
        (``depth_ab.b17.measured_5sigma`` (AB mag), ``score.b17.m50`` (AB mag),
        ``score.b17.purity_at_reference_mag``, ``n_sources`` ...). Entries missing from a job
        are masked. ``meta``: ``sweep_dir``, ``swept`` (override keys taking more than one
        value), ``override_keys``, ``metric_columns``, ``bands``, ``incomplete_jobs``.

    Raises
    ------
    FileNotFoundError
        ``sweep_dir`` is not a directory.
    """
    root = Path(sweep_dir)
    if not root.is_dir():
        raise FileNotFoundError(f"sweep directory {str(sweep_dir)!r} does not exist")
    rows, incomplete = [], []
    for job in find_jobs(root):
        done = is_complete(job)
        rel = job.relative_to(root).as_posix()
        if not done:
            incomplete.append(rel)
            if not include_incomplete:
                continue
        summary = _read_summary(job) if done else {}
        record = _read_json(job / JOB_RECORD)
        rows.append({"job": rel, "complete": done, "rerun": record.get("rerun"),
                     "overrides": _override_items(_read_overrides(job)),
                     "metrics": _flatten(summary),
                     "bands": list((summary.get("depth_ab") or {}).keys())})

    override_keys: list[str] = []
    metric_paths: list[tuple[str, ...]] = []
    bands: list[str] = []
    for r in rows:
        override_keys += [k for k in r["overrides"] if k not in override_keys]
        metric_paths += [p for p in r["metrics"] if p not in metric_paths]
        bands += [b for b in r["bands"] if b not in bands]

    t = Table()
    t["job"] = [r["job"] for r in rows] if rows else np.array([], dtype=str)
    t["complete"] = np.array([r["complete"] for r in rows], dtype=bool)
    if any(r["rerun"] for r in rows):
        t["rerun"] = _column([r["rerun"] for r in rows], "rerun")
    for k in override_keys:
        t[k] = _column([r["overrides"].get(k) for r in rows], k)
    metric_cols = []
    for p in metric_paths:
        name = _metric_name(p)
        if name in t.colnames:
            name = "summary." + name
        vals = [r["metrics"].get(p) for r in rows]
        vals = [None if (v is None or (isinstance(v, float) and math.isnan(v))) else v
                for v in vals]
        t[name] = _column(vals, name)
        metric_cols.append(name)
        if p[:1] == ("depth_ab",) or (p[-1:] and p[-1] in ("m50", "m90", "m50_err",
                                                          "m90_err", "reference_mag")):
            t[name].unit = "mag"
        elif p[:1] == ("timings_s",):
            t[name].unit = "s"
    swept = [k for k in override_keys if len(set(np.ma.asarray(t[k]).tolist())) > 1]
    t.meta.update({
        "sweep_dir": str(root), "override_keys": override_keys, "swept": swept,
        "metric_columns": metric_cols, "bands": bands, "incomplete_jobs": incomplete,
        "description": ("one row per sweep job: its overrides and the numeric entries of its "
                        "summary.json (paths joined with '.'); job_seed is the seed the job "
                        "used; magnitudes AB"),
    })
    return t


# --------------------------------------------------------------------------------------------
# plots
# --------------------------------------------------------------------------------------------
def _metric_groups(t: Table) -> dict[str, dict[str, str]]:
    """Headline metrics: {group name: {band or "": column}}; the band level of a path is
    dropped from the group name."""
    bands = set(t.meta.get("bands", []))
    groups: dict[str, dict[str, str]] = {}
    for col in t.meta.get("metric_columns", []):
        parts = col.split(".")
        if parts[-1] not in HEADLINE_METRICS:
            continue
        band = next((p for p in parts if p in bands), "")
        name = ".".join(p for p in parts if p != band) if band else col
        groups.setdefault(name, {})[band] = col
    return groups


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name)


def plot_sweep(t: Table, out_dir) -> list[Path]:
    """PNG of each headline metric against each swept parameter (one line per band).

    Every completed job is one marker; the line joins the mean over jobs sharing a value
    (replicate seeds, other swept parameters). ``seed`` is never an x axis. Numeric parameters
    are plotted on a linear axis, others as categories. Returns the files written.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    done = t[np.asarray(t["complete"], bool)] if len(t) else t
    params = [k for k in t.meta.get("swept", []) if k != "seed"]
    files = []
    for param in params:
        col = done[param]
        numeric = col.dtype.kind in "iuf"
        if numeric:
            x = np.ma.filled(np.ma.asarray(col, dtype=float), np.nan)
            labels = None
        else:
            raw = [str(v) for v in col]
            cats = sorted(set(raw))
            x = np.array([cats.index(v) for v in raw], float)
            labels = cats
        for group, cols in _metric_groups(done).items():
            fig, ax = plt.subplots(figsize=(6, 4))
            drawn = False
            for band, c in sorted(cols.items()):
                y = np.ma.filled(np.ma.asarray(done[c], dtype=float), np.nan)
                ok = np.isfinite(x) & np.isfinite(y)
                if not ok.any():
                    continue
                xs = np.unique(x[ok])
                means = [np.mean(y[ok][x[ok] == v]) for v in xs]
                lines = ax.plot(xs, means, "-", label=band or None)
                ax.plot(x[ok], y[ok], "o", color=lines[0].get_color(), alpha=0.6)
                drawn = True
            if not drawn:
                plt.close(fig)
                continue
            if labels is not None:
                ax.set_xticks(range(len(labels)), labels)
            ax.set_xlabel(param)
            unit = done[next(iter(cols.values()))].unit
            ax.set_ylabel(f"{group} [{unit}]" if unit else group)
            if group.split(".")[-1] in ("measured_5sigma", "predicted_5sigma", "m50", "m90"):
                ax.set_ylabel(f"{group} (AB mag)")
            if any(cols):
                ax.legend(title="band", fontsize="small")
            ax.set_title(f"{group} vs {param}")
            ax.grid(alpha=0.3)
            fig.tight_layout()
            path = out_dir / f"{_safe(group)}_vs_{_safe(param)}.png"
            with atomic_path(path) as tmp:
                fig.savefig(tmp, format="png", dpi=100)
            plt.close(fig)
            files.append(path)
    return files


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------
def _parser() -> argparse.ArgumentParser:
    p = OneLineParser(prog="simfield-collect", formatter_class=DefaultsHelpFormatter,
                      description="Gather a simfield sweep (Hydra multirun directory) into one "
                                  "table (sweep.ecsv) and plots of its headline metrics.")
    p.add_argument("sweep_dir", metavar="SWEEP_DIR", help="the sweep's hydra.sweep.dir")
    p.add_argument("--out", metavar="DIR", help="output directory (default: SWEEP_DIR/collected)")
    p.add_argument("--no-plots", action="store_true", help="write the table only, no plots")
    return p


def collect_main_args(argv: list[str]) -> int:
    """``simfield-collect SWEEP_DIR [--out DIR]``; returns the exit status (0 ok, 2 error)."""
    prog = "simfield-collect"
    try:
        a = _parser().parse_args(argv)
        root = Path(a.sweep_dir)
        if not root.is_dir():
            raise ArgError(f"sweep directory {a.sweep_dir!r} does not exist")
        check_out_folder(Path(a.out) if a.out else root / "collected",
                         "--out" if a.out else "SWEEP_DIR/collected")
        t = collect(root)
        inc = t.meta["incomplete_jobs"]
        if len(t) == 0:
            n = len(inc)
            raise ArgError(f"no completed jobs in {a.sweep_dir!r} ({n} job director"
                            f"{'y' if n == 1 else 'ies'} without a {COMPLETE_MARKER} marker)")
    except ArgError as exc:
        print(f"{prog}: error: {exc}", file=sys.stderr)
        return 2
    out = Path(a.out) if a.out else root / "collected"
    out.mkdir(parents=True, exist_ok=True)
    with atomic_path(out / "sweep.ecsv") as tmp:
        t.write(tmp, format="ascii.ecsv", overwrite=True)
    plots = [] if a.no_plots else plot_sweep(t, out)
    print(f"{prog}: {len(t)} job{'s' * (len(t) != 1)}, swept: "
          f"{', '.join(t.meta['swept']) or 'nothing'} -> {out / 'sweep.ecsv'} and "
          f"{len(plots)} plot{'s' * (len(plots) != 1)}")
    # selection functions: the (M_UV, z) cells of every complete job added up
    from .selection.combine import combine_completeness

    done = [root / j for j, c in zip(t["job"], t["complete"]) if c]
    for name, s in combine_completeness(done).items():
        with atomic_path(out / f"selection_{name}_completeness.ecsv") as tmp:
            s.write(tmp, format="ascii.ecsv", overwrite=True)
        print(f"{prog}: sample {name}: S(M_UV, z) from {s['n_jobs'][0]} jobs, "
              f"{int(s['n'].sum())} truth galaxies -> {out / f'selection_{name}_completeness.ecsv'}")
    if inc:
        print(f"{prog}: note: {len(inc)} incomplete jobs left out ({', '.join(inc)}); relaunch "
              f"the sweep with the same hydra.sweep.dir to finish them", file=sys.stderr)
    return 0
