"""Command-line entry points: thin Hydra (and argparse) wrappers around plain functions.

``simfield``          make one scenario (or a sweep with ``-m``) into Hydra's run directory
``simfield-score``    score any detection catalogue against a run's truth
``simfield-collect``  gather a sweep directory into one table and plots
"""

from __future__ import annotations

import contextlib
import logging
import shutil
import sys
from pathlib import Path

__all__ = ["main", "score_main", "collect_main"]

CONF_DIR = str(Path(__file__).resolve().parent.parent / "conf")

log = logging.getLogger("simfield")


def _fail(prog: str, msg: str, code: int = 2):
    print(f"{prog}: error: {msg}", file=sys.stderr)
    sys.exit(code)


def _discard_empty_run_dir(run_dir: Path) -> None:
    """Remove a run directory that holds nothing but Hydra's own bookkeeping."""
    if not run_dir.is_dir():
        return
    own = {".hydra", "main.log", "cli.log", "simfield.log"}
    if all(p.name in own for p in run_dir.iterdir()):
        shutil.rmtree(run_dir, ignore_errors=True)
        # and the date folder Hydra made for it, if that is now empty
        with contextlib.suppress(OSError):
            run_dir.parent.rmdir()


def _task(cfg) -> None:
    """Hydra task: validate, then run one scenario into the job's output directory."""
    from hydra.core.hydra_config import HydraConfig

    from .config import to_scenario
    from .errors import ConfigError

    run_dir = Path(HydraConfig.get().runtime.output_dir)
    try:
        sc = to_scenario(cfg)
    except ConfigError as exc:
        _discard_empty_run_dir(run_dir)
        _fail("simfield", str(exc))
    from .pipeline import run_scenario

    res = run_scenario(sc, run_dir, progress=True)
    depth = res.summary.get("depth_ab", {})
    print(f"simfield: wrote {len(res.files)} files to {run_dir}")
    for band, d in depth.items():
        print(f"  {band}: 5-sigma depth {d['measured_5sigma']:.2f} AB (measured), "
              f"{d['predicted_5sigma']:.2f} (predicted)")


def main() -> None:
    """``simfield [overrides]``: run the configured scenario (Hydra command line)."""
    import hydra

    from .config import register_configs

    register_configs()
    wrapped = hydra.main(version_base=None, config_path=CONF_DIR, config_name="config")(_task)
    wrapped()


def score_main(argv: list[str] | None = None) -> None:
    """``simfield-score RUN_DIR --catalog FILE ...``: score a detection catalogue."""
    from .score.run import score_main_args

    sys.exit(score_main_args(sys.argv[1:] if argv is None else argv))


def collect_main(argv: list[str] | None = None) -> None:
    """``simfield-collect SWEEP_DIR``: one table and plots of a sweep's headline metrics."""
    from .sweep import collect_main_args

    sys.exit(collect_main_args(sys.argv[1:] if argv is None else argv))
