"""``simfield --help``: the tool's own help page, with the presets read from ``conf/`` at run time.

The page is built from the shipped configuration folder each time it is printed (groups,
presets, defaults and the first comment line of each preset file), so it cannot fall behind the
presets. It needs no Hydra composition: nothing is run and nothing is written. Hydra's own
page of flags stays available as ``simfield --hydra-help``.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

__all__ = ["GROUP_MEANINGS", "help_page", "preset_groups"]

#: One line per configuration group (a group of conf/ missing here is listed without one).
GROUP_MEANINGS = {
    "telescope": "aperture, pupil, PSF settings, pixel scale and bands",
    "population": "galaxies, stars and contaminants drawn into the field",
    "lens": "optional foreground lens (NFW halo mass_msun = M200c in Msun, members, shear)",
    "detector": "infrared array: read noise (CDS), dark, gain, ramp, IPC, flat, bad pixels, "
                "cosmic rays",
    "survey": "field centre and size, mosaic pixel, exposures, dithers, drizzle, tiling",
    "detection": "baseline detector: threshold, filter, deblending, detection bands",
    "photometry": "forced multi-band aperture photometry of the detections",
    "photoz": "photometric redshifts by template fitting",
    "score": "matching radius, magnitude bins, completeness fit, report",
    "selection": "high-redshift colour / S/N / P(z) samples scored against the truth",
    "limits": "largest estimated disk use and memory of a run (refused above)",
    "cluster": "where the mosaic tiles run: local processes (none) or a Dask cluster",
    "experiment": "sweep presets, added with +experiment=NAME (a -m multirun)",
    "hydra/launcher": "where sweep jobs run (hydra/launcher=NAME)",
}


def _first_comment(path: Path, room: int = 60) -> str:
    """The first sentence of a preset file's opening comment (``@package`` lines skipped),
    shortened to ``room`` characters, or '' when the file opens without a comment."""
    words = []
    for line in path.read_text().splitlines():
        s = line.strip()
        if not s.startswith("#"):
            break
        s = s.lstrip("#").strip()
        if s.startswith("@package"):
            continue
        if not s:
            break
        words.append(s)
    text = " ".join(words).split(". ")[0].rstrip(".")
    if len(text) > room:
        text = text[:room - 4].rsplit(" ", 1)[0].rstrip(",;:(") + " ..."
    return text


def preset_groups(conf_dir: str | Path) -> dict[str, list[str]]:
    """``{group: [preset, ...]}`` of ``conf_dir`` (``group/*.yaml``, plus ``hydra/launcher``)."""
    conf = Path(conf_dir)
    out = {}
    for d in sorted(conf.iterdir()):
        if d.is_dir() and d.name not in ("hydra", "__pycache__"):
            out[d.name] = sorted(p.stem for p in d.glob("*.yaml"))
    launcher = conf / "hydra" / "launcher"
    if launcher.is_dir():
        out["hydra/launcher"] = sorted(p.stem for p in launcher.glob("*.yaml"))
    return out


def _defaults(conf_dir: Path) -> tuple[dict[str, str], dict]:
    """(default preset per group, top-level values) of ``config.yaml``."""
    import yaml

    cfg = yaml.safe_load((conf_dir / "config.yaml").read_text()) or {}
    chosen = {}
    for item in cfg.get("defaults", []):
        if isinstance(item, dict):
            chosen.update({str(k): str(v) for k, v in item.items()})
    return chosen, cfg


def help_page(conf_dir: str | Path, width: int = 92) -> str:
    """The text of ``simfield --help`` for the configuration folder ``conf_dir``."""
    conf = Path(conf_dir)
    chosen, cfg = _defaults(conf)
    wrap = textwrap.TextWrapper(width=width)
    lines = [
        "usage: simfield [group=preset ...] [key=value ...]   (one run)",
        "       simfield -m key=a,b ... | +experiment=NAME     (a sweep of runs)",
        "       simfield --estimate [overrides]                 (resources only, nothing run)",
        "       simfield --job-script cluster=slurm [overrides] (Slurm job script, not submitted)",
        "",
    ]
    lines += wrap.wrap(
        "simfield makes a synthetic deep field and scores detection on it: galaxies, stars and "
        "contaminants from physical models (optionally behind a cluster lens), seen through a "
        "diffraction-limited telescope PSF and an infrared detector with dithered, drizzled "
        "exposures; it writes the mosaics with complete truth catalogues, detects sources, "
        "measures their photometry and photometric redshifts, and scores completeness, "
        "purity, the causes of false detections, high-redshift selections and the effective "
        "survey volume. Every setting is an override: group=preset picks a preset, key=value "
        "sets one value (e.g. simfield survey=quick seed=7). Start with survey=quick.")
    lines += ["", "Configuration groups (group=preset; * marks the default), read from "
              f"{conf}:"]
    for group, presets in preset_groups(conf).items():
        meaning = GROUP_MEANINGS.get(group, "")
        lines.append(f"  {group}: {meaning}" if meaning else f"  {group}:")
        folder = conf / group
        for name in presets:
            mark = "*" if chosen.get(group) == name else "-"
            note = _first_comment(folder / f"{name}.yaml", width - 8 - len(name))
            lines.append(f"    {mark} {name}" + (f"  {note}" if note else ""))
    seed, workers = cfg.get("seed"), cfg.get("workers")
    lines += [
        "",
        "Top-level keys:",
        f"  seed={seed}  the one seed of every random stream (an integer, no unit): the same "
        "seed and settings give identical files",
        f"  workers={workers}  processes (a count) for the mosaic and detection tiles and the "
        "selection's samples; 0 = one per core; the files do not depend on it",
        "  Keys inside a group: group.key=value, units in the key names, e.g. "
        "survey.exposure_time_s=2500 (s), detector.read_noise_e=6 (e-); all of them with "
        "their values: simfield --cfg job",
        "",
        "Output (folder: hydra.run.dir, default outputs/<date>/<time>/; a sweep: "
        "multirun/<date>/<time>/<job>/):",
        "  mosaic_<band>.fits       IMAGE (e-/s), INVVAR, EXPOSURE, FLAGS, NOISECOR",
        "  truth.fits, truth_image_<band>.fits   truth tables (SOURCES, IMAGES) and images",
        "  psf_<band>.fits, psf.png   the PSFs (scene, wide, effective, encircled energy)",
        "  bands.ecsv               pivot, width, AB zero point and sky of each band",
        "  detections_<band>.fits, photometry.fits, photoz.fits   catalogues",
        "  score/<band>/, selection/<sample>/   completeness, purity, volume, report.html",
        "  summary.json, scenario.yaml, COMPLETE (written last)",
        "",
        "Other commands: simfield-score (score a catalogue), simfield-inject (inject into a "
        "real image), simfield-collect (gather a sweep); each has --help.",
        "More: README.md (settings, files, units and conventions), DEVELOPERS.md.",
        "Hydra's own flags (--cfg, --info, --multirun, --config-dir, shell completion, ...): "
        "simfield --hydra-help",
    ]
    out = []
    for ln in lines:
        if len(ln) <= width:
            out.append(ln)
            continue
        indent = " " * (len(ln) - len(ln.lstrip()))
        out.extend(textwrap.wrap(ln.strip(), width=width, initial_indent=indent,
                                 subsequent_indent=indent + "    "))
    return "\n".join(out) + "\n"
