"""Running a batch: bake the planned assets in parallel, write each result as it arrives, then the report.

:func:`run_batch` plans (:mod:`thickbake.batch.plan`), takes the output folder's lock, removes the
temporary files a killed batch left, runs the bakes on a runner (:mod:`thickbake.batch.runners`)
through a small scheduler, writes every map and sidecar in this process and ends with the report
(:mod:`thickbake.batch.report`).

Parallelism
-----------
Assets are baked in a process pool of ``jobs`` processes, by default
``min(cores, assets to bake)``, each bake using ``max(1, cores // jobs)`` threads unless the rules set
``threads``.  Neither changes a map: every random stream derives from (seed, texel), so maps are
bit-identical for any jobs × threads split.  The per-asset worker,
:func:`thickbake.batch.runners.bake_asset`, is a pure function — paths and a settings dict in, a
result dict (map bytes, sidecar, thumbnail) out — and only this process writes to OUT.  A bake
that crashes its process (a segfault, the OOM killer) is retried once on its own; if it crashes
again it is recorded as failed, and the rest go on.  Pool processes start from a fork server that
has already imported the bake modules (where the platform has one; ``spawn`` elsewhere): neither
forks this possibly multi-threaded process, and the server pays the imports once instead of once
per process.  As with any process pool, a script that calls
:func:`run_batch` must guard its top level with ``if __name__ == "__main__":``.

Safety
------
Every file is written to a temporary file in the same folder and renamed into place, the sidecar
after its map, so SIGKILL at any moment leaves complete files only; leftover temporary files
(``.<name>.<random>.tmp``) are deleted when the next batch starts, and the next batch resumes by
skipping what is up to date.  A first Ctrl-C (SIGINT) starts no new asset, lets the bakes in flight
finish and write their maps, writes the report and exits with code 130; a second Ctrl-C abandons the
bakes in flight (nothing of theirs is written), writes the report and exits with 130 as well.  Exit
codes otherwise: 0 when every asset was baked or skipped, 1 when any failed, 2 for bad arguments or
a bad rules file (then nothing is baked).

Cluster
-------
``--cluster tcp://HOST:8786`` sends each bake to a dask.distributed scheduler instead of the local
pool (``pip install "thickbake[cluster]"``).  Start a scheduler on one machine and workers anywhere
that has thickbake installed and sees the source files at the same absolute paths::

    dask scheduler                                   # prints: Scheduler at tcp://10.0.0.5:8786
    dask worker tcp://10.0.0.5:8786 --nworkers 1 --nthreads 1

Each worker bakes with all cores of its machine divided by its ``--nthreads``.  Workers only read
the meshes; the maps come back to this process, which writes them, so OUT need not be shared.
Results are identical to a local run.
"""

from __future__ import annotations

import os
import re
import signal
import threading
import time
from collections import deque
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath
from typing import Callable

from thickbake.errors import ThickbakeError
from thickbake.batch.plan import AssetJob, BatchPlan, asset_sidecars, plan_batch
from thickbake.batch.runners import ClusterRunner, LocalRunner, WorkerDied, available_cores, bake_asset

LOCK_NAME = ".thickbake-batch.lock"
#: Temporary files of :func:`thickbake.maps.files.atomic_write_bytes` (``.<name>.<random>.tmp``) for the
#: files a batch writes; only these are removed at start-up.
_TEMP_NAME = re.compile(r"^\..+\.(png|tif|tiff|exr|glb|gltf|json|html)\.[A-Za-z0-9_]+\.tmp$")
#: Seconds the scheduler waits for a bake to finish before it looks at Ctrl-C and free slots again.
_POLL_SECONDS = 0.25
EXIT_OK, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 130


@dataclass
class BatchOutcome:
    """What a batch did: the plan with every job's final status, the report and the exit code.

    Attributes
    ----------
    plan : BatchPlan
    report : dict or None
        The content of ``report.json``.
    exit_code : int
        0 every asset baked or skipped, 1 any failed (or no report), 130 interrupted.
    jobs_used : int
        Bakes run at once (0: nothing to bake).
    threads : int or None
        Threads per bake; None on a cluster (each worker chooses).
    seconds : float
        Wall-clock seconds of the whole batch.
    interrupted : bool
        Ctrl-C stopped it.
    report_error : str or None
        One line when report.json/report.html could not be written (then the exit code is 1).
    """

    plan: BatchPlan
    report: dict | None
    exit_code: int
    jobs_used: int = 0
    threads: int | None = None
    seconds: float = 0.0
    interrupted: bool = False
    report_error: str | None = None


# ---------------------------------------------------------------------------- the batch
def run_batch(src, out, config=None, *, jobs: int | None = None, force: bool = False, cluster: str | None = None,
              progress: Callable[[float, int, str], None] | None = None, notify: Callable[[str], None] | None = None,
              worker: Callable[[dict], dict] = bake_asset, previews: bool = False) -> BatchOutcome:
    """Bake every asset under ``src`` that is not up to date into ``out`` and write the report.

    Parameters
    ----------
    src, out : str or os.PathLike
        Source folder and output folder.
    config : str or os.PathLike, optional
        Rules file; default ``src/thickbake.toml`` when present.
    jobs : int, optional
        Assets baked at once (default: cores, at most the number of assets to bake; with a
        cluster, the cluster's worker threads).
    force : bool
        Bake assets even when they are up to date.
    cluster : str, optional
        Address of a dask.distributed scheduler, ``tcp://HOST:PORT``.
    progress : callable(fraction, rays_traced, note), optional
    notify : callable(str), optional
        Receives one line per failure and other messages worth a user's attention.
    worker : callable(task) -> dict
        The per-asset function (a module-level function, so it can be sent to processes).
    previews : bool
        Also write each asset's viewer page beside its map and put a back-lit still of it, rendered
        by headless Chromium, into the report (:mod:`thickbake.batch.previews`).

    Returns
    -------
    BatchOutcome
        The plan with every job's final status, the report dict and the exit code.
    """
    started = time.perf_counter()
    started_at = datetime.now(timezone.utc)
    notify = notify or (lambda text: None)
    if jobs is not None and (isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1):
        raise ThickbakeError(f"--jobs {jobs!r} is not allowed",
                             fix="give a whole number of assets to bake at once, at least 1")
    plan = plan_batch(src, out, config, force)
    _announce(plan, notify)
    todo = plan.to_bake()
    cores = available_cores()
    runner = None
    if todo and cluster:
        runner = ClusterRunner(cluster, jobs, worker)  # a bad address is an argument error: nothing written yet
    try:
        _make_folder(plan.out)
        with _output_lock(plan.out):
            clean_temp_files(plan.out, keep=plan.src)
            if cluster:
                jobs_used = runner.capacity() if runner else 0
                threads = None
            else:
                jobs_used = min(jobs or cores, len(todo))
                threads = max(1, cores // jobs_used) if jobs_used else None
                runner = LocalRunner(jobs_used, worker) if todo else None
            interrupted = _Scheduler(plan, todo, runner, threads, progress, notify).run() if todo else False
            shown = {}
            if previews and not interrupted:
                from thickbake.batch.previews import batch_previews

                shown = batch_previews(plan, stills=True, notify=notify, progress=progress)
            from thickbake.batch.report import build_report

            report = build_report(plan, started_at, time.perf_counter() - started, cores, jobs_used, threads,
                                  cluster, force, interrupted, shown)
            report_error = _write_report(plan, report, shown)
    finally:
        if runner is not None:
            runner.close()
    failed = any(j.status == "failed" for j in plan.jobs) or report_error is not None
    code = EXIT_INTERRUPTED if interrupted else (EXIT_FAILED if failed else EXIT_OK)
    return BatchOutcome(plan=plan, report=report, exit_code=code, jobs_used=jobs_used, threads=threads,
                        seconds=time.perf_counter() - started, interrupted=interrupted, report_error=report_error)


def _announce(plan: BatchPlan, notify: Callable[[str], None]) -> None:
    """Tell the user what planning found: rules that match nothing, skipped links, assets refused."""
    for rule in plan.unused_rules:
        notify(f"warning: {plan.rules.path}: {rule.label()} matches no asset")
    for text in plan.warnings:
        notify(f"warning: {text}")
    for job in plan.jobs:  # refused while planning (unreadable, FIFO, URI outside its folder, name clash)
        if job.status == "failed" and not job.reason:
            notify(f"failed: {job.asset.rel}: {job.result.error}")


def _make_folder(out: Path) -> None:
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ThickbakeError(f"cannot create the output folder ({exc.strerror or exc})", path=out,
                             fix="check the path and its permissions") from None


def _write_report(plan: BatchPlan, report: dict, shown: dict) -> str | None:
    """Write report.json and report.html; None, or one line saying why they could not be written."""
    from thickbake.batch.report import batch_thumbnails, write_reports

    try:
        write_reports(plan.out, report, batch_thumbnails(plan), {k: v["still"] for k, v in shown.items()})
    except OSError as exc:
        # the maps and sidecars are written and consistent; only the summary is missing
        return (f"{plan.out}: cannot write the report ({exc.strerror or exc}); the maps are written, "
                "free some space or fix the folder's permissions and run the batch again to get it")
    except ThickbakeError as exc:
        return exc.one_line()
    return None


# ---------------------------------------------------------------------------- the scheduler
class _Scheduler:
    """Runs the bakes on a runner and writes each result as it arrives.

    The largest bakes start first (that balances the pool); a bake suspected of crashing its pool
    runs alone; the baked members of a shared-reach group wait until the last member is back, then
    are encoded with one reach (:func:`finish_group`).
    """

    def __init__(self, plan: BatchPlan, todo: list[AssetJob], runner, threads: int | None,
                 progress: Callable[[float, int, str], None] | None, notify: Callable[[str], None]):
        self.plan, self.todo, self.runner, self.threads = plan, todo, runner, threads
        self.progress, self.notify = progress, notify
        self.pending = deque(sorted(todo, key=lambda j: (-j.queue.cost, j.asset.rel)))
        self.running: dict = {}  # runner handle -> job
        self.total_cost = sum(j.queue.cost for j in todo)
        self.tally = {"cost": 0.0, "rays": 0, "done": 0, "failed": 0}
        self.group_left: dict[str, int] = {}  # shared-reach group -> members not back yet
        for job in todo:
            name = job.asset.options.delivery.get("shared_reach")
            if name:
                self.group_left[name] = self.group_left.get(name, 0) + 1
        self.held: dict[str, list] = {}  # shared-reach group -> (job, result) of its baked members

    def run(self) -> bool:
        """Bake every job, write its result; returns True when interrupted."""
        with _Interrupts(self.notify) as interrupts:
            try:
                while self.pending or self.running:
                    self._step(interrupts)
            except KeyboardInterrupt:
                self._abandon()
                return True
        for items in self.held.values():  # groups cut short by an interrupt: nothing of theirs is written
            for job, _ in items:
                job.status, job.reason = "not started", "its shared-reach group did not finish (interrupted)"
        return interrupts.count > 0

    def _step(self, interrupts: "_Interrupts") -> None:
        if interrupts.count:
            interrupts.announce_once()
            for job in self.pending:
                job.status, job.reason = "not started", "interrupted before it started"
            self.pending.clear()
        self._start_bakes()
        if self.running:
            self._collect()

    def _start_bakes(self) -> None:
        while self.pending and len(self.running) < self.runner.capacity():
            if self.running and (self.pending[0].queue.solo or any(j.queue.solo for j in self.running.values())):
                break  # a suspect of a crash runs alone
            job = self.pending.popleft()
            self.running[self.runner.submit(worker_task(self.plan, job, self.threads))] = job

    def _collect(self) -> None:
        """Finish the bakes that are back; when a pool process died, recover."""
        died: list[AssetJob] = []
        for handle in self.runner.wait(list(self.running), _POLL_SECONDS):
            self._receive(handle, died)
        if died:
            self._recover(died)

    def _receive(self, handle, died: list[AssetJob]) -> None:
        job = self.running.pop(handle)
        try:
            self._finish(job, self.runner.outcome(handle))
        except WorkerDied:
            died.append(job)

    def _recover(self, died: list[AssetJob]) -> None:
        """The whole pool is gone: collect every bake that was in it, then start afresh.  A lone
        casualty (or a suspect that already ran alone) fails; several are retried, each alone."""
        for handle in list(self.running):
            self._receive(handle, died)
        self.runner.restart()
        for job in reversed(died):
            job.queue.attempts += 1
            if job.queue.solo or len(died) == 1:
                self._finish(job, {"status": "failed", "failure": "crash",
                                   "error": f"{job.asset.source}: the bake process died "
                                            "(crashed or killed, e.g. out of memory); try a smaller size"})
            else:
                job.queue.solo = True
                self.pending.appendleft(job)

    def _finish(self, job: AssetJob, result: dict) -> None:
        """Write a bake's result; a shared-reach group's baked members wait for the group's last one."""
        name = job.asset.options.delivery.get("shared_reach")
        if not name:
            self._write(job, result)
            return
        self.group_left[name] -= 1
        if result.get("status") == "baked":
            self.held.setdefault(name, []).append((job, result))
        else:
            self._write(job, result)
        if self.group_left[name] == 0:
            for member, outcome in finish_group(self.plan, name, self.held.pop(name, []), self.threads):
                self._write(member, outcome)

    def _write(self, job: AssetJob, result: dict) -> None:
        """Apply a result (write its files), count it and move the progress bar."""
        apply_result(self.plan.out, job, result)
        tally = self.tally
        tally["cost"] += job.queue.cost
        tally["done"] += 1
        if job.status == "failed":
            tally["failed"] += 1
            self.notify(f"failed: {job.asset.rel}: {job.result.error}")
        else:
            tally["rays"] += sum(int(m["data"].get("rays_traced", 0)) for m in job.result.maps)
        if self.progress is not None:
            failed = f", {tally['failed']} failed" if tally["failed"] else ""
            note = f" {tally['done']}/{len(self.todo)} assets{failed}"
            self.progress(tally["cost"] / self.total_cost, tally["rays"], note)

    def _abandon(self) -> None:
        """A second Ctrl-C: end the bakes in flight; nothing not yet written will be."""
        self.runner.abandon()
        for job in self.todo:  # in flight, queued, or caught between its two writes
            if job.status == "bake":
                job.status, job.reason = "not started", "abandoned by a second interrupt before it was written"


def finish_group(plan: BatchPlan, name: str, items: list, threads: int | None) -> list:
    """Encode the baked members of a shared-reach group with one reach: the largest of their fitted
    reaches (``reach = "fit"``), so every map of the group decodes with the same factor.

    ``items`` holds (job, worker result) of each baked member; returns (job, result to apply) pairs.
    """
    from thickbake.batch.runners import task_outputs
    from thickbake.pipeline.finish import with_reach

    if not items:
        return []
    fitted = {job.asset.rel: max(r.settings.reach for r in result["deferred"]["baked"]["thickness"])
              for job, result in items}
    reach = max(fitted.values())
    record = {"group": name, "reach": reach, "members": sorted(fitted), "rule": "largest fitted reach of the members"}
    out = []
    for job, result in items:
        deferred = result["deferred"]
        baked = dict(deferred["baked"])
        baked["thickness"] = [with_reach(r, reach, record) for r in baked["thickness"]]
        try:
            outcome = task_outputs(worker_task(plan, job, threads), baked, deferred["volume_plan"])
        except ThickbakeError as exc:
            outcome = {"status": "failed", "error": exc.one_line(), "failure": "user"}
        except Exception as exc:  # a bug: this asset fails with its traceback, the batch goes on
            import traceback

            outcome = {"status": "failed", "failure": "internal", "traceback": traceback.format_exc(),
                       "error": f"{job.asset.source}: internal error ({type(exc).__name__}: {exc}); please report it"}
        else:
            outcome.update(status="baked", threads=result.get("threads"), worker=result.get("worker"),
                           worker_seconds=result.get("worker_seconds"),
                           warnings=list(result.get("warnings") or []) + outcome.pop("delivery_warnings"))
        out.append((job, outcome))
    return out


def worker_task(plan: BatchPlan, job: AssetJob, threads: int | None) -> dict:
    """The task of an asset for :func:`thickbake.batch.runners.bake_asset`: plain paths and settings."""
    asset = job.asset
    transfer = asset.transfer
    return {
        "delivery": dict(asset.options.delivery),
        "outputs": dict(asset.outputs),
        "out_dir": str((plan.out / asset.map_rel).parent),
        "source": str(asset.source),
        "map_name": PurePosixPath(asset.map_rel).name,
        "format": asset.options.format,
        "settings": dict(asset.options.settings),
        "threads": threads,
        "transfer": {"source": [str(plan.src / p) for p in transfer["source"]],
                     "cage": str(plan.src / transfer["cage"]) if transfer.get("cage") else None,
                     "search_distance": transfer.get("search_distance")} if transfer else {},
        "batch": {"source": asset.rel, "requested_settings_hash": asset.requested_hash,
                  "inputs_sha256": asset.inputs_sha256, "rules": list(asset.options.rules)},
    }


# ---------------------------------------------------------------------------- writing results
def apply_result(out: Path, job: AssetJob, result: dict) -> None:
    """Record a worker's result on the job and write its maps and sidecars (each sidecar after its map).

    Maps of an earlier bake of the same asset that this bake no longer makes (the asset lost a
    material or a tile) are removed, so the folder holds exactly the asset's current maps.
    """
    record = job.result
    record.worker_seconds = result.get("worker_seconds")
    record.threads = result.get("threads")
    record.worker = result.get("worker")
    record.warnings = result.get("warnings") or []
    if result.get("status") != "baked":
        job.fail(result.get("error") or "unknown error", result.get("failure") or "internal")
        record.traceback = result.get("traceback")
        return
    stale = {side for side, _ in asset_sidecars(job.asset, out)}
    try:
        maps = _write_files(out, PurePosixPath(job.asset.map_rel).parent, result)
    except ThickbakeError as exc:
        job.status = "failed"
        record.error = exc.one_line()
        return
    stale -= {out / m["sidecar"] for m in maps}
    for side in stale:
        for path in (side, side.with_suffix(Path(job.asset.map_rel).suffix)):
            try:
                path.unlink()
            except OSError:
                pass
    job.status = "baked"
    record.maps = maps


def _write_files(out: Path, folder: PurePosixPath, result: dict) -> list[dict]:
    """Write a baked asset's delivery files, then each map and its sidecar (in that order, atomic
    each) into ``out / folder``; returns the maps as :attr:`AssetResult.maps` lists them."""
    from thickbake.maps.files import atomic_write_bytes, write_map

    for name, blob in (result.get("extra_files") or {}).items():  # delivery files before the maps
        try:
            atomic_write_bytes(out / folder / name, blob)
        except OSError as exc:
            raise ThickbakeError(f"cannot write {name} ({exc.strerror or exc})", path=out / folder / name,
                                 fix="check the folder is writable and has free space") from None
    maps = []
    for item in result["maps"]:
        map_rel = (folder / item["name"]).as_posix()
        side_rel = PurePosixPath(map_rel).with_suffix(".json").as_posix()
        write_map(out / map_rel, item["map_bytes"], item["sidecar"])  # sidecar last, atomic each
        maps.append({"map": map_rel, "sidecar": side_rel, "data": item["sidecar"], "thumbnail": item.get("thumbnail")})
    return maps


# ---------------------------------------------------------------------------- safety
class _Interrupts:
    """SIGINT handling while bakes run: the first asks to stop, the second abandons."""

    def __init__(self, notify: Callable[[str], None]):
        self.count = 0
        self.notify = notify
        self._previous = None
        self._announced = False

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            self._previous = signal.signal(signal.SIGINT, self._handle)
        return self

    def __exit__(self, *exc):
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)
        return False

    def _handle(self, signum, frame):
        # Only count here: printing from a signal handler can collide with a write in progress.
        self.count += 1
        if self.count > 1:
            raise KeyboardInterrupt

    def announce_once(self) -> None:
        if self.count and not self._announced:
            self._announced = True
            self.notify("stopping: no new asset starts; the bakes in flight finish and are written "
                        "(press Ctrl-C again to abandon them)")


@contextmanager
def _output_lock(out: Path):
    """Hold an exclusive lock on OUT for the batch; the kernel drops it if the process dies."""
    try:
        import fcntl
    except ImportError:  # Windows: no lock
        yield
        return
    try:
        fd = os.open(out / LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise ThickbakeError(f"cannot write into the output folder ({exc.strerror or exc})", path=out,
                             fix="check its permissions, or give another -o folder") from None
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ThickbakeError("another 'thickbake batch' is writing into this folder", path=out,
                                 fix="wait for it to finish, or give another -o folder") from None
        except OSError:
            pass  # a file system without locks (some network shares): go on unlocked
        yield
    finally:
        os.close(fd)


def clean_temp_files(out: Path, keep: Path | None = None) -> int:
    """Delete temporary files a killed batch left in ``out``; returns how many.  ``keep`` is not entered."""
    removed = 0
    keep = keep.resolve() if keep is not None else None
    for dirpath, dirnames, filenames in os.walk(out):
        here = Path(dirpath)
        dirnames[:] = [d for d in dirnames if not d.startswith(".") and (keep is None or (here / d).resolve() != keep)]
        removed += sum(_remove(here / name) for name in filenames if _TEMP_NAME.match(name))
    return removed


def _remove(path: Path) -> bool:
    """Delete a file; False when it could not be (already gone, no permission)."""
    try:
        os.unlink(path)
    except OSError:
        return False
    return True


__all__ = ["run_batch", "finish_group", "worker_task", "apply_result", "clean_temp_files", "BatchOutcome",
           "LOCK_NAME", "EXIT_OK", "EXIT_FAILED", "EXIT_INTERRUPTED"]
