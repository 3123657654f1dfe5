"""Tiles on Dask (simfield.engine): same files as local processes, one-line failures, the Slurm
job script; detection tiles on Dask; tile-level resume of an interrupted run (simfield.resume).
Kept small: one band, one PSF wavelength, an 8" field cut into four tiles."""

import json
import socket
import sys
from pathlib import Path
from types import SimpleNamespace

import pytest
from astropy.io import fits

from simfield import __version__
from simfield.config import config_hash, to_yaml
from simfield.engine import ClusterUnavailable, WorkerLost, open_engine, slurm_job_script
from simfield.errors import ConfigError
from simfield.io import COMPLETE_MARKER
from simfield.pipeline import run_scenario
from simfield.resume import PART_SUFFIX, RESUME_DIR, resume_key
from simfield.sweep import remove_partial_files
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


def assert_same_files(a: Path, b: Path) -> list[str]:
    """Every file of run folder ``a`` is in ``b`` byte for byte and nothing else is (hidden
    resume folders included); summary.json may differ only by its timings."""
    names = sorted(str(p.relative_to(a)) for p in a.rglob("*") if p.is_file())
    assert names == sorted(str(p.relative_to(b)) for p in b.rglob("*") if p.is_file())
    for n in names:
        if n == "summary.json":
            sa, sb = (json.loads((d / n).read_text()) for d in (a, b))
            sa.pop("timings_s"), sb.pop("timings_s")
            assert sa == sb
        else:
            assert (a / n).read_bytes() == (b / n).read_bytes(), n
    return names


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
    KilledWorker from a tile) gives WorkerLost, with no final image file and no COMPLETE (the
    files being written only in the run's resume folder); the same run relaunched renders only
    the tiles not recorded as done and writes every file byte for byte as the local processes
    did (the same seed); summary.json differs only by its timings."""
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
    # the files being written stay in the resume folder only, never under a final name
    outside = [p.name for p in b.rglob("*") if p.is_file() and RESUME_DIR not in p.parts]
    assert not [n for n in outside if n.endswith((".part", PART_SUFFIX))]
    assert list((b / RESUME_DIR).glob(f"*/mosaic_b17.fits{PART_SUFFIX}"))
    n_done = len(list((b / RESUME_DIR).rglob("tile_*.done")))
    assert n_done <= 3
    rendered = []

    def counting(ctx, i):
        rendered.append(i)
        return real(ctx, i)

    monkeypatch.setattr(pipeline, "_render_tile", counting)
    run_scenario(sc, b)
    assert len(rendered) == 4 - n_done and 2 in rendered  # done tiles are not rendered again
    names = assert_same_files(a, b)
    assert "mosaic_b17.fits" in names and COMPLETE_MARKER in names
    assert not (b / RESUME_DIR).exists()
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


def test_slurm_workers_start_without_the_malloc_trim_threshold():
    """The job script exports the Dask setting that leaves MALLOC_TRIM_THRESHOLD_ out of the
    workers' environment (as for the LocalCluster); a shell running that line gives a Dask
    whose nanny would start workers without it, with Dask's other settings kept."""
    import subprocess

    from simfield.config import ClusterConfig
    from simfield.engine import NO_TRIM_EXPORT

    text = slurm_job_script(ClusterConfig(kind="slurm"))
    assert NO_TRIM_EXPORT in text.splitlines()
    assert text.index(NO_TRIM_EXPORT) < text.index("distributed.cli.dask_worker")
    probe = ("from distributed.nanny import _get_env_variables as g; "
             "print(sorted(g('distributed.nanny.pre-spawn-environ')))")
    out = subprocess.run(["bash", "-c", f"{NO_TRIM_EXPORT}; {sys.executable} -c \"{probe}\""],
                         capture_output=True, text=True, check=True).stdout
    assert "MALLOC_TRIM_THRESHOLD_" not in out and "OMP_NUM_THREADS" in out


def test_interrupted_run_resumes_from_its_done_tiles(local_run, monkeypatch):
    """A run stopped at its third tile (the tile raising, as an interruption would; local
    processes, one worker) leaves no image file under a final name, no COMPLETE, and markers
    for exactly the two tiles done, under the key of its configuration. Relaunched in the same
    folder (after the command line's clean-up of temporary files) it renders only the two
    other tiles, removes a resume folder of another
    configuration (never reused), and writes every file byte for byte as the uninterrupted
    run of the same seed did."""
    from simfield import pipeline

    tmp, res = local_run
    real, rendered = pipeline._render_tile, []

    def stop_at_2(ctx, i):
        if i == 2:
            raise RuntimeError("interrupted")
        rendered.append(i)
        return real(ctx, i)

    sc, b = tiny(tmp), tmp / "resumed"
    key = resume_key(config_hash(sc), __version__)
    assert key != resume_key(config_hash(tiny(tmp, "seed=2")), __version__)
    monkeypatch.setattr(pipeline, "_render_tile", stop_at_2)
    with pytest.raises(RuntimeError, match="interrupted"):
        run_scenario(sc, b)
    assert rendered == [0, 1]
    assert not (b / "mosaic_b17.fits").exists() and not (b / COMPLETE_MARKER).exists()
    done = sorted(p.name for p in (b / RESUME_DIR / key).glob("tile_*.done"))
    assert done == ["tile_000000.done", "tile_000001.done"]
    stale = b / RESUME_DIR / ("0" * 16)  # what a run of another configuration left
    stale.mkdir()
    for i in range(4):
        (stale / f"tile_{i:06d}.done").write_text('{"timings": {}}')
    kept = sorted((b / RESUME_DIR / key).rglob("*.part"))
    stray = b / ".mosaic_b17.fits.x.part"  # a temporary file of a killed earlier write
    stray.write_bytes(b"x")
    # what the command line does first in an existing run folder: the resume folder is kept
    assert remove_partial_files(b) == [stray]
    assert kept and all(p.exists() for p in kept)
    rendered.clear()

    def counting(ctx, i):
        rendered.append(i)
        return real(ctx, i)

    monkeypatch.setattr(pipeline, "_render_tile", counting)
    run_scenario(sc, b)
    assert rendered == [2, 3]
    assert_same_files(res.out_dir, b)
    assert not (b / RESUME_DIR).exists()


def test_detection_tiles_on_dask_match_local_processes(local_run, tmp_path, monkeypatch):
    """Detection cut into four tiles (100-pixel cores, 24-pixel margins) as tasks of a Dask
    LocalCluster writes the same detections file, byte for byte, as in one local process."""
    from simfield import detect
    from simfield.io import Provenance
    from simfield.pipeline import make_bands

    tmp, res = local_run
    sc = tiny(tmp, "cluster=local", "cluster.processes=false")
    monkeypatch.setattr(detect, "TILE_CORE_PIX", 100)
    monkeypatch.setattr(detect, "TILE_MARGIN_PIX", 24)
    prov = Provenance(sc.seed, config_hash(sc), to_yaml(sc))
    dirs = []
    for name in ("local", "dask"):
        d = tmp_path / name
        d.mkdir()
        for f in ("mosaic_b17.fits", "psf_b17.fits"):
            (d / f).symlink_to(res.out_dir / f)
        dirs.append(d)
    n_local = detect.run_detection(dirs[0], sc, make_bands(sc), prov, workers=1)
    with open_engine(sc.cluster) as engine:
        n_dask = detect.run_detection(dirs[1], sc, make_bands(sc), prov, engine=engine)
    assert n_local == n_dask and n_local["b17"] > 0
    a, b = (d / "detections_b17.fits" for d in dirs)
    assert a.read_bytes() == b.read_bytes()
    with fits.open(b) as hl:
        assert hl["DETECTIONS"].header["NTILES"] == 4
        assert hl["SEGMAP"].data.max() == n_dask["b17"]


def test_run_stopped_in_detection_renders_nothing_again(local_run, tmp_path, monkeypatch):
    """A run stopped after two of its four detection tiles (100-pixel cores) keeps its finished
    images and those two tiles' results in its resume folder: relaunched in the same folder it
    renders no image tile and detects only the two other detection tiles, and its files are
    byte for byte those of a run never stopped (common practice for restartable pipelines)."""
    from simfield import detect, pipeline

    tmp, _ = local_run
    monkeypatch.setattr(detect, "TILE_CORE_PIX", 100)
    monkeypatch.setattr(detect, "TILE_MARGIN_PIX", 24)
    sc = tiny(tmp, "detection.enabled=true")
    ref = run_scenario(sc, tmp_path / "ref").out_dir
    calls = {"render": 0, "detect": 0}
    real_render, real_detect = pipeline._render_tile, detect._detect_tile

    def render(ctx, i):
        calls["render"] += 1
        return real_render(ctx, i)

    def stop_at_third(job, tile, *rest):
        calls["detect"] += 1
        if calls["detect"] == 3:
            raise RuntimeError("interrupted")
        return real_detect(job, tile, *rest)

    monkeypatch.setattr(pipeline, "_render_tile", render)
    monkeypatch.setattr(detect, "_detect_tile", stop_at_third)
    b = tmp_path / "stopped"
    with pytest.raises(RuntimeError, match="interrupted"):
        run_scenario(sc, b)
    assert calls == {"render": 4, "detect": 3}
    assert (b / "mosaic_b17.fits").exists() and not (b / "detections_b17.fits").exists()
    assert len(list((b / RESUME_DIR).glob("*/detect_b17/tile_*.pkl"))) == 2
    remove_partial_files(b)
    calls.update(render=0, detect=0)
    monkeypatch.setattr(detect, "_detect_tile", real_detect)
    monkeypatch.setattr(detect, "_compute_tiles",
                        lambda job, tiles, *a: (calls.__setitem__("detect", len(tiles)),
                                                (real_detect(job, t) for t in tiles))[1])
    run_scenario(sc, b)
    assert calls == {"render": 0, "detect": 2}
    assert_same_files(ref, b)
    assert not (b / RESUME_DIR).exists()


def test_local_cluster_workers_keep_the_default_allocator_settings():
    """The LocalCluster's worker processes run without Dask's MALLOC_TRIM_THRESHOLD_: setting
    it turns off glibc's dynamic mmap threshold (mallopt(3), Linux man-pages: setting
    M_TRIM_THRESHOLD disables the dynamic adjustment), so every large temporary array would be
    mapped and zeroed anew, as the local processes' are not. Dask's other worker settings
    (one BLAS thread) stay."""
    import os

    from simfield.config import ClusterConfig

    with open_engine(ClusterConfig(kind="local", n_workers=1)) as engine:
        env = engine.client.run(lambda: (os.environ.get("MALLOC_TRIM_THRESHOLD_"),
                                         os.environ.get("OMP_NUM_THREADS")))
    assert list(env.values()) == [(None, "1")]


def test_run_tail_task_runs_on_a_worker_process_not_in_threads_here(tmp_path):
    """The run's scoring goes to the cluster as one task beside photometry and selection
    (pipeline._Beside with an engine): on a worker process of its own; with a LocalCluster of
    threads (processes=false, sharing this process's matplotlib) it runs here, at once."""
    import os
    import threading

    from simfield.pipeline import _Beside

    sc = tiny(tmp_path, "cluster=local", "cluster.n_workers=1")
    with open_engine(sc.cluster) as engine:
        task = _Beside(os.getpid, (), apart=False, engine=engine)
        assert task.result() != os.getpid()
        # two tasks of one function are two tasks (the scheduler shares a task among clients
        # that submit the same key: runs side by side on one scheduler must not collide)
        a, b = engine.submit(abs, -1), engine.submit(abs, -2)
        assert (engine.wait(a, "test"), engine.wait(b, "test")) == (1, 2)
    sc = tiny(tmp_path, "cluster=local", "cluster.processes=false")
    with open_engine(sc.cluster) as engine:
        task = _Beside(threading.get_ident, (), apart=False, engine=engine)
        assert task.result() == threading.get_ident()
