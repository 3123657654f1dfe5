"""Command-line entry points: thin Hydra (and argparse) wrappers around plain functions.

``simfield``          make one scenario (or a sweep with ``-m``) into Hydra's run directory
``simfield-score``    score any detection catalogue against a run's truth
``simfield-collect``  gather a sweep directory into one table and plots
``simfield-inject``   inject model sources into a real image, detect and score them
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path

from ._preflight import check_run_folder, preflight
from .config import CONF_DIR
from .errors import ConfigError

__all__ = ["main", "score_main", "collect_main", "inject_main", "preflight", "refusal_line"]

log = logging.getLogger("simfield")


def _fail(prog: str, msg: str, code: int = 2):
    print(f"{prog}: error: {msg}", file=sys.stderr)
    sys.exit(code)


def refusal_line(exc: ConfigError) -> str:
    """``<key>: <value> <what is allowed>``, on one line."""
    value = repr(exc.value) if isinstance(exc.value, str) or exc.value is None else exc.value
    return " ".join(f"{exc.key}: {value} {exc.allowed}".split())


def _task(cfg) -> None:
    """Hydra task: run one (already validated, see :func:`preflight`) scenario into the job's
    output directory."""
    from hydra.core.hydra_config import HydraConfig
    from hydra.types import RunMode

    from .config import to_scenario
    from .pipeline import run_scenario
    from .sweep import plan_job, remove_partial_files, write_job_record

    run_dir = Path(HydraConfig.get().runtime.output_dir)
    sc = to_scenario(cfg)
    hc = HydraConfig.get()
    plan = plan_job(sc, list(hc.overrides.task), run_dir, hc.mode == RunMode.MULTIRUN)
    if plan.skip:
        print(f"simfield: {run_dir} is complete, skipped (resume)")
        return
    remove_partial_files(run_dir)  # left by a killed earlier attempt of this job
    write_job_record(run_dir, plan)
    from .engine import ClusterUnavailable, WorkerLost

    try:
        res = run_scenario(plan.scenario, run_dir, progress=True)
    except (ClusterUnavailable, WorkerLost) as exc:
        _fail("simfield", str(exc), 1)
    depth = res.summary.get("depth_ab", {})
    print(f"simfield: wrote {len(res.files)} files to {run_dir}")
    for band, d in depth.items():
        print(f"  {band}: 5-sigma depth {d['measured_5sigma']:.2f} AB (measured), "
              f"{d['predicted_5sigma']:.2f} (predicted)")
    for name, why in res.summary.get("skipped", {}).items():
        print(f"  {name}: not run, {why}")


def _print_estimate(argv: list[str]) -> None:
    from .resources import check_run, estimate

    scenarios = preflight(argv, check=False)
    for i, sc in enumerate(scenarios):
        print(f"simfield: estimate{f' of job {i}' if len(scenarios) > 1 else ''} (nothing run)")
        for line in estimate(sc).lines():
            print(f"  {line}")
        try:
            check_run(sc)
            print(f"  within limits.disk_gb={sc.limits.disk_gb:g} and "
                  f"limits.memory_gb={sc.limits.memory_gb:g}")
        except ConfigError as exc:
            print(f"  would be refused: {refusal_line(exc)}")


def _print_job_script(argv: list[str]) -> None:
    """``--job-script``: the Slurm batch script of one Dask worker job, not submitted."""
    from .engine import slurm_job_script

    for sc in preflight(argv, check=False):
        if sc.cluster.kind != "slurm":
            raise ConfigError("cluster.kind", sc.cluster.kind,
                              "must be slurm for --job-script (cluster=slurm)")
        print("simfield: the job script dask-jobqueue would submit per worker job (not "
              "submitted):", file=sys.stderr)
        print(slurm_job_script(sc.cluster))


def _check_clusters(scenarios) -> None:
    """Refuse a run whose Dask scheduler does not answer, before anything is written."""
    from .engine import check_reachable

    for a in {(sc.cluster.address, sc.cluster.connect_timeout_s) for sc in scenarios
              if sc.cluster.kind == "scheduler"}:
        check_reachable(*a)


def main() -> None:
    """``simfield [overrides]``: run the configured scenario (Hydra command line).

    Every job of the command line is composed and validated first (:func:`preflight`); a bad
    setting is refused with one line on stderr and status 2 before Hydra writes anything.
    ``simfield --estimate [overrides]`` prints the resources each job would take and exits;
    ``simfield --job-script cluster=slurm [overrides]`` prints the Slurm job script of one Dask
    worker job without submitting it.
    ``simfield --help`` prints the tool's page (:mod:`simfield._help`: groups and presets read
    from ``conf/``); Hydra's own page of flags is ``simfield --hydra-help``.
    """
    import hydra

    from .config import register_configs

    argv = sys.argv[1:]
    if "--help" in argv or "-h" in argv:  # the tool's page; Hydra's is --hydra-help
        from ._help import help_page

        sys.stdout.write(help_page(CONF_DIR))
        return
    try:
        if "--estimate" in argv:
            _print_estimate([a for a in argv if a != "--estimate"])
            return
        if "--job-script" in argv:
            _print_job_script([a for a in argv if a != "--job-script"])
            return
        _check_clusters(preflight(argv))
        check_run_folder(argv)
    except ConfigError as exc:
        _fail("simfield", refusal_line(exc))
    register_configs()
    wrapped = hydra.main(version_base=None, config_path=CONF_DIR, config_name="config")(_task)
    wrapped()


def score_main(argv: list[str] | None = None) -> None:
    """``simfield-score RUN_DIR --catalog FILE ...``: score a detection catalogue."""
    from .score.run import score_main_args

    sys.exit(score_main_args(sys.argv[1:] if argv is None else argv))


_INJECT_DESCRIPTION = (
    "Inject model sources drawn from the scenario's population (injection mode, "
    "population=uniform, unless an override picks another) into a real image with a celestial "
    "WCS, convolved with its PSF, detect before and after the injection, and score the new "
    "detections as for a mock. Usage: simfield-inject IMAGE --band B [options] [overrides].")


def _inject_parser():
    """The argument parser of ``simfield-inject`` (every default in its help)."""
    import argparse

    from ._argparse import DefaultsHelpFormatter

    p = argparse.ArgumentParser(prog="simfield-inject", description=_INJECT_DESCRIPTION,
                                formatter_class=DefaultsHelpFormatter)
    p.add_argument("image", help="FITS image with a celestial WCS")
    p.add_argument("--band", required=True, help="the scenario band the image is taken in "
                   "(required, no default)")
    p.add_argument("--psf", help="PSF image (FITS, PIXSCALE in arcsec) (default: the model "
                   "PSF of the band)")
    p.add_argument("--hdu", help="image HDU name or number (default: IMAGE, SCI or the first "
                   "image)")
    p.add_argument("--weight-hdu", help="inverse-variance HDU (default: INVVAR, WHT, else "
                   "estimated)")
    p.add_argument("--zeropoint", type=float, help="AB magnitude of one image unit "
                   "(default: header ZP_AB)")
    p.add_argument("--out", help="output directory (default: outputs/inject_<image name>)")
    p.add_argument("overrides", nargs="*", help="Hydra overrides of the scenario, e.g. "
                   "population.uniform_mag_max=30 (default: none; population=uniform unless "
                   "given)")
    return p


def inject_main(argv: list[str] | None = None) -> None:
    """``simfield-inject IMAGE --band B [options] [overrides]``: inject model sources into a
    real image, detect and score them as for a mock."""
    from .errors import SimfieldError

    a = _inject_parser().parse_intermixed_args(sys.argv[1:] if argv is None else argv)


    def hdu(v):
        return int(v) if v is not None and v.isdigit() else v

    from hydra import compose, initialize_config_dir

    from ._argparse import ArgError, check_out_folder
    from .config import register_configs, to_scenario
    from .inject import inject_into_image

    register_configs()
    overrides = list(a.overrides)
    if not any(o.startswith("population=") for o in overrides):
        overrides.insert(0, "population=uniform")
    try:
        with initialize_config_dir(CONF_DIR, version_base=None):
            sc = to_scenario(compose("config", overrides=overrides))
        out = Path(a.out or f"outputs/inject_{Path(a.image).stem}")
        check_out_folder(out, "--out" if a.out else "the output folder")
        summary = inject_into_image(a.image, sc, a.band, out, a.psf, hdu(a.hdu), a.zeropoint,
                                    hdu(a.weight_hdu))
    except (SimfieldError, ArgError) as exc:
        _fail("simfield-inject", str(exc))
    except Exception as exc:  # Hydra override syntax errors and the like
        _fail("simfield-inject", f"{type(exc).__name__}: {exc}")
    m50 = summary.get("m50")
    print(f"simfield-inject: {summary['n_injected']} sources injected, "
          f"{summary['n_matched']} recovered; "
          + (f"m50 = {m50:.2f} AB" if m50 is not None else
             f"m50 not quoted ({summary.get('m50_reason')})") + f"; results in {out}")


def collect_main(argv: list[str] | None = None) -> None:
    """``simfield-collect SWEEP_DIR``: one table and plots of a sweep's headline metrics."""
    from .sweep import collect_main_args

    sys.exit(collect_main_args(sys.argv[1:] if argv is None else argv))
