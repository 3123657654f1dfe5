"""Tiles on Dask (simfield.engine): same files as local processes, one-line failures, the Slurm
job script. Kept small: one band, one PSF wavelength, an 8" field cut into four tiles."""

import json
import socket
import sys
from pathlib import Path
from types import SimpleNamespace

import pytest
from astropy.io import fits

from simfield.config import config_hash, to_yaml
from simfield.engine import ClusterUnavailable, WorkerLost, slurm_job_script
from simfield.errors import ConfigError
from simfield.io import COMPLETE_MARKER
from simfield.pipeline import run_scenario
from tests.conftest import make_scenario

pytest.importorskip("distributed")

BAND = "telescope.bands=[{name:b17,center_nm:1700,width_nm:380}]"


def tiny(tmp: Path, *overrides):
    """8" x 8" field, one band, small one-wavelength PSFs, four 120-pixel tiles, no detection."""
    return make_scenario("survey=quick", "survey.width_arcsec=8", "survey.height_arcsec=8",
                         "survey.tile_pixels=120", BAND, "telescope.psf.n_wavelengths=1",
                         "telescope.psf.spike_radius_arcsec=1.0",
                         "telescope.psf.core_radius_arcsec=0.6", "detection.enabled=false",
                         "score.enabled=false", "photometry.enabled=false", "selection=none",
                         "workers=1", f"telescope.psf.cache_dir={tmp / 'psf_cache'}", *overrides)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("engine")
    return tmp, run_scenario(tiny(tmp), tmp / "local")


def test_cluster_is_not_part_of_what_a_run_makes(tmp_path):
    """The cluster choice changes neither the configuration hash nor the YAML written."""
    a, b = tiny(tmp_path), tiny(tmp_path, "cluster=local")
    assert b.cluster.kind == "local"
    assert config_hash(a) == config_hash(b) and to_yaml(a) == to_yaml(b)
    assert not any(line.startswith("cluster:") for line in to_yaml(b).splitlines())
    with pytest.raises(ConfigError, match="cluster.kind"):
        tiny(tmp_path, "cluster.kind=cloud")
    with pytest.raises(ConfigError, match="cluster.address"):
        tiny(tmp_path, "cluster=scheduler", "cluster.address=not an address")


def test_unreachable_scheduler_is_one_line_and_writes_nothing(tmp_path, monkeypatch, capsys):
    """No scheduler on the port: refused before anything is written, by the command line
    (one line, status 2) and by run_scenario (ClusterUnavailable)."""
    addr = f"tcp://127.0.0.1:{_free_port()}"
    sc = tiny(tmp_path, "cluster=scheduler", f"cluster.address={addr}",
              "cluster.connect_timeout_s=1")
    with pytest.raises(ClusterUnavailable, match="not reachable"):
        run_scenario(sc, tmp_path / "run")
    assert not (tmp_path / "run").exists()
    from simfield import cli

    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "argv", ["simfield", "survey=quick", "cluster=scheduler",
                                      f"cluster.address={addr}", "cluster.connect_timeout_s=1",
                                      f"hydra.run.dir={tmp_path / 'cli'}"])
    with pytest.raises(SystemExit) as exc:
        cli.main()
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "cluster.address" in err and "not reachable" in err
    assert not (tmp_path / "cli").exists()


def test_dask_run_survives_a_lost_worker_and_writes_the_same_bytes(local_run, monkeypatch):
    """cluster=local (a Dask LocalCluster, two workers): a worker lost mid-run (Dask's
    KilledWorker from a tile) gives WorkerLost, with no final image file, no temporary file and
    no COMPLETE; the same run relaunched then writes every file byte for byte as the local
    processes did (the same seed); summary.json differs only by its timings."""
    from distributed.scheduler import KilledWorker

    from simfield import pipeline

    tmp, res = local_run
    real = pipeline._render_tile

    def dying(ctx, i):
        if i == 2:
            raise KilledWorker("simfield-tiles-2", SimpleNamespace(address="tcp://127.0.0.1:1"),
                               3)
        return real(ctx, i)

    sc = tiny(tmp, "cluster=local", "cluster.processes=false")
    a, b = res.out_dir, tmp / "dask"
    monkeypatch.setattr(pipeline, "_render_tile", dying)
    with pytest.raises(WorkerLost, match="run the same command again"):
        run_scenario(sc, b)
    assert not (b / "mosaic_b17.fits").exists() and not (b / COMPLETE_MARKER).exists()
    assert not list(b.rglob("*.part"))
    monkeypatch.setattr(pipeline, "_render_tile", real)
    run_scenario(sc, b)
    names = sorted(str(p.relative_to(a)) for p in a.rglob("*") if p.is_file())
    assert names == sorted(str(p.relative_to(b)) for p in b.rglob("*") if p.is_file())
    assert "mosaic_b17.fits" in names and COMPLETE_MARKER in names
    for n in names:
        if n == "summary.json":
            sa, sb = (json.loads((d / n).read_text()) for d in (a, b))
            sa.pop("timings_s"), sb.pop("timings_s")
            assert sa == sb
        else:
            assert (a / n).read_bytes() == (b / n).read_bytes(), n
    # read back from outside the writer: the tiles were really written (not an empty file)
    with fits.open(b / "mosaic_b17.fits") as hl:
        assert (hl["INVVAR"].data > 0).mean() > 0.9


def test_slurm_job_script_is_printed_not_submitted(tmp_path, monkeypatch, capsys):
    """--job-script prints the sbatch script with the partition, account, cores, memory and
    walltime given (Slurm's #SBATCH -p/-A/-t directives; sbatch(1) [mem])."""
    sc = tiny(tmp_path, "cluster=slurm", "cluster.partition=short", "cluster.account=proj42",
              "cluster.cores=8", "cluster.memory_gb=32", "cluster.walltime=02:30:00")
    text = slurm_job_script(sc.cluster)
    assert text.startswith("#!/")
    for line in ("#SBATCH -p short", "#SBATCH -A proj42", "#SBATCH -t 02:30:00",
                 "#SBATCH -n 1", "#SBATCH --cpus-per-task=8"):
        assert line in text, line
    from simfield import cli

    monkeypatch.setattr(sys, "argv", ["simfield", "--job-script", "cluster=slurm",
                                      "cluster.partition=long"])
    cli.main()
    cap = capsys.readouterr()
    assert cap.out.startswith("#!/") and "#SBATCH -p long" in cap.out
    assert "not submitted" in cap.err
