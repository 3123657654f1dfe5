"""Tiles on a Dask distributed cluster (``cluster=local|scheduler|slurm``).

``workers`` keeps meaning local processes (:func:`simfield.pipeline._map_tiles`); the
``cluster`` key (:class:`~simfield.config.ClusterConfig`, presets in ``conf/cluster/``) sends the
tiles to Dask instead: an in-process ``LocalCluster``, a running scheduler at an address, or
Slurm jobs through dask-jobqueue. Each tile is one task; the task renders the tile and writes its
sections into the run's files being written (:class:`simfield.io.SectionFile`, memory maps of
files in the run folder, which the workers must see: a shared filesystem), then flushes them
(``fsync``) so the parent reads what the worker wrote. The files are renamed into place only by
the parent after every task succeeded, so a lost worker never leaves a partial file under a final
name. Tiles draw only from their own named streams and a re-run task writes the same bytes, so
the files are identical to a local run of the same seed whatever the cluster (and the cluster
is not part of the configuration hash).

Failures give one line: :class:`ClusterUnavailable` (no scheduler answered) before anything is
written, :class:`WorkerLost` (a worker died, the scheduler went away) during the tiles.
"""

from __future__ import annotations

import contextlib
import logging
import os
import re
import socket
import sys
import uuid
from typing import Callable, Iterator, Sequence

from .errors import ConfigError, SimfieldError

__all__ = ["ClusterUnavailable", "WorkerLost", "DaskEngine", "open_engine", "check_reachable",
           "slurm_job_script"]

log = logging.getLogger("simfield")


class ClusterUnavailable(SimfieldError, RuntimeError):
    """No Dask cluster could be reached or started; nothing was written."""


class WorkerLost(SimfieldError, RuntimeError):
    """A Dask worker died (or the scheduler went away) while tiles ran; no file was renamed
    into place and the same command can be run again."""


#: The Dask setting that gives nanny-started workers a malloc trim threshold (see
#: :func:`open_engine`).
_TRIM = "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_"
#: The same setting unset for the workers of a Slurm job, in its script: Dask reads
#: DASK_<SECTION>__<KEY> variables as configuration (their values as Python literals) and
#: merges a dict into the default one, where None removes the variable from the workers'.
NO_TRIM_EXPORT = ("export DASK_DISTRIBUTED__NANNY__PRE_SPAWN_ENVIRON="
                  "\"{'MALLOC_TRIM_THRESHOLD_': None}\"")


def _host_port(address: str) -> tuple[str, int]:
    m = re.fullmatch(r"(?:\w+://)?([\w.\-]+):(\d+)", address)
    if m is None:
        raise ConfigError("cluster.address", address, "must be host:port or tcp://host:port")
    return m.group(1), int(m.group(2))


def check_reachable(address: str, timeout_s: float) -> None:
    """Raise :class:`ConfigError` (key ``cluster.address``) unless a TCP connection to the
    scheduler at ``address`` opens within ``timeout_s`` seconds."""
    host, port = _host_port(address)
    try:
        with socket.create_connection((host, port), timeout=timeout_s):
            pass
    except OSError as exc:
        why = "timed out" if isinstance(exc, TimeoutError) else (exc.strerror or str(exc))
        raise ConfigError("cluster.address", address,
                          f"is not reachable: no Dask scheduler answered within "
                          f"{timeout_s:g} s ({why.lower()}); start one (dask scheduler) or "
                          f"choose cluster=local") from None


def _fsync(paths: Sequence[str]) -> None:
    """Write back what this process wrote through memory maps (shared filesystems)."""
    for p in paths:
        fd = os.open(p, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _run_task(fn: Callable, ctx, i: int, sync: Sequence[str]):
    out = fn(ctx, i)
    _fsync(sync)
    return out


def _task_key(name: str) -> str:
    """A Dask key readable on the dashboard and unique to this call: the scheduler shares a
    task among clients that submit the same key, so two runs on one scheduler (a sweep's jobs
    side by side) must not name their tiles alike."""
    return f"simfield-{name}-{uuid.uuid4().hex[:12]}"


def _result(future, desc: str, kept: str = ""):
    """``future.result()``, or one :class:`WorkerLost` line if its worker or the scheduler
    went away during the ``desc`` (``kept``: what of the run survives, appended)."""
    from distributed.comm.core import CommClosedError
    from distributed.scheduler import KilledWorker

    try:
        return future.result()
    except (KilledWorker, CommClosedError, OSError, TimeoutError) as exc:
        raise WorkerLost(
            f"a Dask worker was lost during the {desc} ({type(exc).__name__}: "
            f"{str(exc).splitlines()[0] if str(exc) else 'no detail'}); no file was renamed "
            f"into place: run the same command again{kept}") from None


class DaskEngine:
    """A Dask client (and the cluster it started, if any) mapping tiles to tasks."""

    def __init__(self, client, cluster=None, label: str = ""):
        self.client, self.cluster, self.label = client, cluster, label

    @property
    def dashboard(self) -> str:
        """The Dask dashboard's address ('' when it is not served: bokeh missing)."""
        services = self.client.scheduler_info().get("services", {})
        return self.client.dashboard_link if "dashboard" in services else ""

    def map(self, fn: Callable, ctx, n: int | Sequence[int], sync: Sequence[str] = (),
            desc: str = "tiles", progress: bool = False) -> list:
        """``[fn(ctx, i) for i in items]``, one Dask task per ``i``, results in order; ``n`` is
        the items (tile indices) or their number (``range(n)``). See :meth:`imap`."""
        return list(self.imap(fn, ctx, n, sync, desc, progress))

    def imap(self, fn: Callable, ctx, n: int | Sequence[int], sync: Sequence[str] = (),
             desc: str = "tiles", progress: bool = False) -> Iterator:
        """:meth:`map` as a generator: every task is submitted at once and the results are
        yielded in order as they arrive (each released once yielded, so the caller holds one
        at a time).

        ``ctx`` is sent to every worker once; after each task the files ``sync`` are flushed on
        the worker. Raises :class:`WorkerLost` if a worker dies (Dask retries a task on
        another worker first) or the scheduler goes away.
        """
        from tqdm import tqdm

        items = range(n) if isinstance(n, int) else list(n)
        if not items:
            return
        c = self.client
        ctx_f = c.scatter(ctx, broadcast=True, hash=False)
        futures = [c.submit(_run_task, fn, ctx_f, i, list(sync), pure=False,
                            key=_task_key(f"{desc.replace(' ', '-')}-{i}")) for i in items]
        bar = tqdm(total=len(futures), desc=desc, unit="tile", disable=not progress,
                   leave=False)
        try:
            for k in range(len(futures)):
                out = _result(futures[k], desc, " (finished mosaic tiles are kept)")
                futures[k] = None
                bar.update()
                yield out
        finally:
            bar.close()
            c.cancel([f for f in futures if f is not None] + [ctx_f], force=True)

    @property
    def separate_processes(self) -> bool:
        """Whether the tasks run in processes other than this one (not in threads of a
        LocalCluster with ``processes=false``, which share this process's matplotlib)."""
        return not (self.cluster is not None and getattr(self.cluster, "processes", True)
                    is False)

    def submit(self, fn: Callable, *args):
        """``fn(*args)`` as one Dask task, started now; :meth:`wait` gives its result."""
        return self.client.submit(fn, *args, pure=False, key=_task_key(fn.__name__))

    def wait(self, future, desc: str):
        """The result of a :meth:`submit` task; :class:`WorkerLost` if its worker or the
        scheduler went away."""
        return _result(future, desc)

    def close(self) -> None:
        with contextlib.suppress(Exception):
            self.client.close()
        if self.cluster is not None:
            with contextlib.suppress(Exception):
                self.cluster.close()


def _slurm_kwargs(cfg) -> dict:
    procs = max(1, cfg.cores // cfg.threads_per_worker)
    kw = dict(cores=cfg.cores, processes=procs, memory=f"{cfg.memory_gb:g}GB",
              walltime=cfg.walltime, job_name="simfield", job_extra_directives=list(cfg.job_extra),
              job_script_prologue=[NO_TRIM_EXPORT])  # glibc's defaults, as in open_engine
    if cfg.partition:
        kw["queue"] = cfg.partition
    if cfg.account:
        kw["account"] = cfg.account
    return kw


def slurm_job_script(cfg) -> str:
    """The batch script dask-jobqueue would submit for one worker job of ``cfg`` (a
    :class:`~simfield.config.ClusterConfig`), without starting a scheduler or submitting."""
    from dask_jobqueue.slurm import SLURMJob

    job = SLURMJob(scheduler="tcp://<scheduler>:8786", name="simfield-worker",
                   **_slurm_kwargs(cfg))
    return job.job_script()


@contextlib.contextmanager
def open_engine(cfg, progress: bool = False) -> Iterator[DaskEngine | None]:
    """The Dask engine of ``cfg`` (a :class:`~simfield.config.ClusterConfig`) for the block,
    ``None`` for ``kind=none``; closed (cluster shut down) after it. Connecting happens here,
    before the run writes anything; raises :class:`ClusterUnavailable` on failure."""
    if cfg.kind == "none":
        yield None
        return
    try:
        from distributed import Client
    except ImportError as exc:  # pragma: no cover - a dependency
        raise ClusterUnavailable(f"cluster={cfg.kind} needs the dask distributed package "
                                 f"({exc})") from None
    cluster = None
    try:
        if cfg.kind == "local":
            from distributed import LocalCluster

            import dask

            # Dask's nanny gives its workers MALLOC_TRIM_THRESHOLD_, which turns off glibc's
            # dynamic mmap threshold: every large temporary array is then mapped and zeroed
            # anew (one 50" tile: 14x the page faults, 8x the system time, +17% wall). The
            # local processes run with glibc's defaults, and so do these workers.
            with dask.config.set({_TRIM: None}):
                cluster = LocalCluster(n_workers=cfg.n_workers,
                                       threads_per_worker=cfg.threads_per_worker,
                                       processes=cfg.processes, dashboard_address=":0",
                                       silence_logs=logging.ERROR)
            client = Client(cluster)
        elif cfg.kind == "scheduler":
            try:
                check_reachable(cfg.address, cfg.connect_timeout_s)
            except ConfigError as exc:
                raise ClusterUnavailable(f"cluster.address: {exc.value!r} {exc.allowed}") from None
            client = Client(cfg.address, timeout=f"{cfg.connect_timeout_s}s")
        elif cfg.kind == "slurm":
            from dask_jobqueue import SLURMCluster

            cluster = SLURMCluster(dashboard_address=":0", **_slurm_kwargs(cfg))
            cluster.scale(jobs=cfg.n_workers)
            client = Client(cluster)
        else:  # validated already
            raise ClusterUnavailable(f"cluster.kind: {cfg.kind!r} is not a Dask cluster kind")
    except ClusterUnavailable:
        if cluster is not None:
            cluster.close()
        raise
    except Exception as exc:
        if cluster is not None:
            with contextlib.suppress(Exception):
                cluster.close()
        raise ClusterUnavailable(f"cluster={cfg.kind}: could not start or reach the Dask "
                                 f"cluster ({type(exc).__name__}: "
                                 f"{str(exc).splitlines()[0] if str(exc) else ''})") from None
    engine = DaskEngine(client, cluster, cfg.kind)
    dash = engine.dashboard
    msg = (f"simfield: Dask cluster={cfg.kind}, dashboard "
           f"{dash or 'not served (install bokeh to get one)'}")
    log.info(msg)
    if progress:
        print(msg, file=sys.stderr)
    try:
        yield engine
    finally:
        engine.close()
