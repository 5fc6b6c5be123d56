"""Where a batch's bakes run: the per-asset worker, a local process pool, a dask.distributed cluster.

:func:`bake_asset` is a pure function — a task dict (paths and settings) in, a result dict (the
encoded map, its sidecar, a thumbnail) out, no files written — so the same function runs in a pool
process on this machine or on a cluster worker, and the batch alone writes to the output folder.

Both runners answer the same small interface used by :mod:`thickbake.batch.schedule`: ``capacity()`` (bakes
to keep in flight), ``submit(task)`` → handle, ``wait(handles, timeout)`` → finished handles,
``outcome(handle)`` → result dict (or :class:`WorkerDied` when a pool process died), ``restart()``,
``abandon()`` and ``close()``.
"""

from __future__ import annotations

import concurrent.futures as cf
import hashlib
import multiprocessing
import os
import signal
import socket
import threading
import time
import traceback
from contextlib import contextmanager
from pathlib import Path
from typing import Callable

from thickbake.errors import ThickbakeError
from thickbake.batch.rules import FORMATS
from thickbake.settings import settings_from_mapping, usable_cores

#: Modules the fork server imports once, so that pool processes start without importing them.
_POOL_PRELOAD = ["thickbake.batch.runners", "thickbake.batch.plan", "thickbake.pipeline.driver",
                 "thickbake.pipeline.load", "thickbake.pipeline.trace", "thickbake.batch.report", "trimesh", "embreex.rtcore_scene", "scipy.stats.qmc", "PIL.PngImagePlugin",
                 "PIL.TiffImagePlugin"]
#: How long to try reaching a dask scheduler before giving up.
CLUSTER_CONNECT_SECONDS = 10


def available_cores() -> int:
    """Cores this process may use (the affinity mask where the platform has one)."""
    return usable_cores()


def bake_asset(task: dict) -> dict:
    """Bake one asset; a pure function shared by the local pool and the cluster.

    Parameters
    ----------
    task : dict
        ``source`` (absolute mesh path), ``map_name`` (file name of the map when the asset makes
        one; several maps get the names of :mod:`thickbake.maps.naming` in the same folder),
        ``format`` (``"png"`` or ``"tif"``), ``settings`` (BakeSettings and RunOptions fields as given),
        ``threads`` (int or None: all cores of this machine over the tasks it runs at once),
        ``transfer`` (optional: ``source`` list of absolute paths, ``cage``, ``search_distance``, the
        keyword arguments of a transfer bake) and
        ``batch`` (dict recorded in the sidecar under ``"batch"``).

    Returns
    -------
    dict
        ``status`` (``"baked"`` or ``"failed"``), ``error`` (one line or None), ``failure``
        (``"user"`` for the user's mistakes, which fail again on the same input; ``"user-remote"``
        for those on a dask worker; else ``"internal"`` or ``"resources"``), ``traceback``
        (internal errors only), ``maps`` (one dict per map of the asset — material, UV set, UDIM
        tile: ``name``, ``map_bytes``, ``sidecar``, ``thumbnail``, ``warnings``), ``threads``,
        ``worker`` (host name), ``worker_seconds`` and ``warnings`` (the asset's and every map's).
        Nothing is written to disk.
    """
    start = time.perf_counter()
    out = {"status": "failed", "error": None, "failure": None, "traceback": None, "threads": None,
           "worker": _worker_name()}
    try:
        out.update(_bake_asset(task))
        out["status"] = "baked"
    except ThickbakeError as exc:
        remote = _on_which_worker()
        # on a cluster the cause may be the worker's view of the files, so it is not remembered
        out["error"], out["failure"] = exc.one_line() + remote, "user-remote" if remote else "user"
    except MemoryError:
        out["error"] = f"{task['source']}: out of memory; bake a smaller size or run fewer --jobs"
        out["failure"] = "resources"
    except Exception as exc:  # a bug, not the user's mistake: keep the traceback for the report
        detail = " ".join(str(exc).split())[:200]
        out["error"] = f"{task['source']}: internal error ({type(exc).__name__}: {detail}); please report it"
        out["failure"], out["traceback"] = "internal", traceback.format_exc()
    out["worker_seconds"] = round(time.perf_counter() - start, 3)
    return out


def _bake_asset(task: dict) -> dict:
    from thickbake.pipeline.driver import bake_maps
    from thickbake.pipeline.load import load_asset

    settings, run = settings_from_mapping(task["settings"], where=task["source"])
    if run.threads is None:
        run = run.replace(threads=task.get("threads") or _threads_here())
    delivery = task.get("delivery") or {}
    if delivery.get("shared_reach"):
        settings = settings.replace(reach="fit")  # the batch sets the group's reach when all are baked
    volume_plan = None
    if delivery.get("write_gltf"):
        from thickbake.pipeline.deliver import check_volume_request

        volume_plan = check_volume_request(task["source"], Path(task["out_dir"]) / task["outputs"]["gltf"], settings,
                                           uv_set=settings.uv_set, transmission=delivery.get("gltf_transmission"))
    asset = load_asset(task["source"])
    transfer = task.get("transfer") or {}
    if transfer:
        from thickbake.pipeline.transfer import load_source

        transfer = dict(transfer, source=load_source(transfer["source"]))  # once, for every measure baked
    baked = {settings.measure: bake_maps(asset, settings, run, **transfer)}
    for measure in (delivery.get("pack") or {}).values():
        if measure not in baked:
            from thickbake.pipeline.deliver import settings_for_measure

            baked[measure] = bake_maps(asset, settings_for_measure(settings, measure), run, **transfer)
    if delivery.get("pack") and len(baked[settings.measure]) > 1:
        raise ThickbakeError(f"pack packs one map, and the asset makes {len(baked[settings.measure])} (one per "
                             "material, UV set and tile)", path=task["source"],
                             fix="leave pack out for this asset (a rule with a narrower match)")
    if volume_plan is not None and any(r.key.tile is not None for r in baked[settings.measure]):
        raise ThickbakeError("the UV layout spans UDIM tiles, which glTF textures cannot address",
                             path=task["source"], fix="leave write_gltf out for this asset")
    # in a transfer the target is not traced: its holes and winding do not matter, its UVs do
    target_warnings = [w for w in asset.report.warnings if not task.get("transfer") or "UV" in w]
    warnings = target_warnings + [w for rs in baked.values() for r in rs for w in r.info["warnings"]]
    if delivery.get("shared_reach"):
        return {"deferred": {"baked": baked, "volume_plan": volume_plan}, "threads": run.threads,
                "warnings": warnings}
    out = task_outputs(task, baked, volume_plan)
    out.update(threads=run.threads, warnings=warnings + out.pop("delivery_warnings"))
    return out


def task_outputs(task: dict, baked: dict, volume_plan) -> dict:
    """Encode a finished bake into the files of its task: the maps, their sidecars and thumbnails, and
    the delivery files (glTF copy, packed PNG and its sidecar), all as bytes; nothing is written.

    ``baked`` maps each measure baked to its list of map results (the first is the task's measure).
    The batch calls this itself for a shared-reach group, once the group's reach is known.
    """
    from thickbake.batch.report import thumbnail_png
    from thickbake.maps.files import json_bytes
    from thickbake.maps.naming import default_name, name_fields, stem_of
    from thickbake.maps.sidecar import with_batch_record

    settings, _ = settings_from_mapping(task["settings"], where=task["source"])
    delivery = task.get("delivery") or {}
    results = baked[settings.measure]
    suffix = FORMATS[task["format"]]
    assert Path(task["map_name"]).suffix.lower() == suffix
    keys = [dict(r.key.to_dict(), material_index=r.key.material_index) for r in results]
    stem = stem_of(task["source"]) if len(results) > 1 else None
    names = ([default_name(f, suffix) for f in name_fields(stem, settings.measure, keys)] if stem
             else [task["map_name"]])
    out_dir = Path(task["out_dir"])
    extra: dict[str, bytes] = {}
    notes: list[str] = []
    if volume_plan is not None:
        from thickbake.pipeline.deliver import write_gltf_copy

        maps = ([(results[0], None, settings.uv_set)] if len(results) == 1 else
                [(r, [r.key.material_index], settings.uv_set) for r in results if r.key.material_index is not None])
        files, report = write_gltf_copy(task["source"], out_dir / task["outputs"]["gltf"], volume_plan, maps,
                                        delivery.get("gltf_transmission"), write=False)
        notes += report.pop("warnings")
        for r in results:
            r.info["gltf"] = report
        extra.update({path.name: data for path, data in files.items()})
    if delivery.get("pack"):
        from thickbake.pipeline.deliver import packed_outputs

        channels = [(c, m) for c, m in delivery["pack"].items()]
        name = task["outputs"]["packed"]
        data, side, record = packed_outputs(out_dir / name, channels, {m: rs[0] for m, rs in baked.items()},
                                            settings.bits, fresh=True)
        extra[name] = data
        extra[str(Path(name).with_suffix(".json"))] = json_bytes(side)
        results[0].info["packed_into"] = record
    outputs = {name: hashlib.sha256(blob).hexdigest() for name, blob in extra.items()}
    maps = []
    for result, name in zip(results, names):
        image = result.image(suffix)
        data, sidecar = result.encode(name, image)
        sidecar = with_batch_record(sidecar, dict(task["batch"], maps=names, **({"outputs": outputs} if outputs else {})),
                                    data)
        maps.append({"name": name, "map_bytes": data, "sidecar": sidecar, "thumbnail": thumbnail_png(image),
                     "warnings": list(result.info["warnings"])})
    return {"maps": maps, "extra_files": extra, "delivery_warnings": notes}


def _threads_here() -> int:
    """Threads for one bake on this machine: its cores over the tasks a dask worker runs at once."""
    try:
        from distributed import get_worker

        worker = get_worker()
        slots = getattr(worker, "nthreads", None) or getattr(getattr(worker, "state", None), "nthreads", 1)
    except (ImportError, ValueError):
        slots = 1
    return max(1, available_cores() // max(1, int(slots)))


def _on_which_worker() -> str:
    """`` (on dask worker ADDRESS)`` inside a dask worker, else empty: a cluster's paths may differ."""
    try:
        from distributed import get_worker

        return f" (on dask worker {get_worker().address})"
    except (ImportError, ValueError, AttributeError):
        return ""


def _worker_name() -> str:
    try:
        return socket.gethostname()
    except OSError:
        return "unknown"


def _worker_start(batch_pid: int, pids=None) -> None:
    """Pool process set-up: Ctrl-C is the batch's to handle, a dead batch ends the process, and the
    process announces its pid on ``pids`` (a queue the batch reads to end the pool at once)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if pids is not None:
        pids.put(os.getpid())
    threading.Thread(target=_watch_batch, args=(batch_pid, os.getppid()), daemon=True).start()


def _watch_batch(batch_pid: int, parent_pid: int) -> None:
    # Under spawn the parent is the batch; under forkserver it is the fork server, which outlives a
    # killed batch for as long as its pool processes live, so the batch's own pid is watched too.
    while True:
        time.sleep(1.0)
        if os.getppid() != parent_pid or (os.name == "posix" and not _process_alive(batch_pid)):
            os._exit(1)  # the batch was killed: a result would go nowhere


def _process_alive(pid: int) -> bool:
    """POSIX only (on Windows ``os.kill`` would end the process)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # the pid now belongs to another user's process
        return False
    except OSError:
        return True
    try:  # a killed batch its parent has not reaped yet is a zombie
        with open(f"/proc/{pid}/stat", "rb") as handle:
            return handle.read().rsplit(b")", 1)[1].split()[0] != b"Z"
    except (OSError, IndexError):
        return True


def _pool_context():
    """``forkserver`` with the bake modules preloaded where available, else ``spawn``."""
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(_POOL_PRELOAD)  # no effect once the server runs
        return context
    return multiprocessing.get_context("spawn")


@contextmanager
def _children_ignore_sigint():
    """Processes started inside this block ignore Ctrl-C from their first instruction.

    A terminal's Ctrl-C goes to the whole process group; the batch alone decides what it means.
    An ignored signal stays ignored through ``exec``, and Python then installs no KeyboardInterrupt
    handler, so the fork server (and every pool process it forks) neither dies nor prints a
    traceback while it imports modules or unpickles a task.  Meanwhile SIGINT is also blocked in
    this thread, so a Ctrl-C that arrives is kept pending for the batch's own handler rather than
    dropped (unless another thread of this process takes it).  Only the main thread can do this.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    mask = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT}) if hasattr(signal, "pthread_sigmask") else None
    handler = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, handler)
        if mask is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, mask)


# ---------------------------------------------------------------------------- runners
class WorkerDied(Exception):
    """The process running a bake died (crash, OOM killer, kill)."""


class LocalRunner:
    """A process pool of ``jobs`` processes (see :func:`_pool_context`).

    ``concurrent.futures`` has no public way to end a pool's processes at once (only to wait for or
    cancel its tasks), so each process sends its pid on a queue when it starts, and :meth:`abandon`
    signals those pids.
    """

    def __init__(self, jobs: int, worker: Callable[[dict], dict]):
        self.jobs = jobs
        self.worker = worker
        self._pool: cf.ProcessPoolExecutor | None = None
        self._pid_queue = None

    def capacity(self) -> int:
        return self.jobs

    def submit(self, task: dict):
        if self._pool is None:
            context = _pool_context()
            if context.get_start_method() == "forkserver":
                from multiprocessing import forkserver

                with _children_ignore_sigint():
                    forkserver.ensure_running()  # starts the server (not waiting for its imports)
            self._forkserver = context.get_start_method() == "forkserver"
            self._pid_queue = context.SimpleQueue()
            self._pool = cf.ProcessPoolExecutor(max_workers=self.jobs, mp_context=context,
                                                initializer=_worker_start,
                                                initargs=(os.getpid(), self._pid_queue))
        if self._forkserver:
            return self._pool.submit(self.worker, task)  # forked by the server: SIGINT already ignored
        with _children_ignore_sigint():  # spawn: the processes start here
            return self._pool.submit(self.worker, task)

    def wait(self, handles, timeout: float):
        return cf.wait(handles, timeout=timeout, return_when=cf.FIRST_COMPLETED)[0]

    def outcome(self, handle) -> dict:
        try:
            return handle.result()
        except cf.process.BrokenProcessPool:
            raise WorkerDied from None
        except Exception as exc:  # e.g. a result that cannot be sent back
            return {"status": "failed", "error": f"the bake process failed ({type(exc).__name__}: {exc})"}

    def restart(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
            self._pid_queue = None

    def abandon(self) -> None:
        """End the pool's processes now: their bakes are dropped (nothing of theirs is written)."""
        if self._pool is None:
            return
        for pid in self._started_pids():
            try:
                os.kill(pid, signal.SIGTERM)
            except OSError:  # already gone
                pass
        self._pool.shutdown(wait=False, cancel_futures=True)
        self._pool = None
        self._pid_queue = None

    def _started_pids(self) -> list[int]:
        """Pids the pool's processes announced (each process is alive until the pool shuts down)."""
        pids = []
        while self._pid_queue is not None and not self._pid_queue.empty():
            pids.append(self._pid_queue.get())
        return pids

    def close(self) -> None:
        self.restart()


class ClusterRunner:
    """Bakes on a dask.distributed cluster through a client connected to its scheduler."""

    def __init__(self, address: str, jobs: int | None, worker: Callable[[dict], dict]):
        try:
            import distributed
        except ImportError:
            raise ThickbakeError("--cluster needs dask.distributed", fix='pip install "thickbake[cluster]"') from None
        try:
            self.client = distributed.Client(address, timeout=f"{CLUSTER_CONNECT_SECONDS}s")
        except Exception as exc:
            detail = " ".join(str(exc).split())[:160] or type(exc).__name__
            raise ThickbakeError(f"cannot reach the dask scheduler at {address} ({detail})",
                                 fix="start one with 'dask scheduler' and workers with 'dask worker tcp://HOST:8786', "
                                     "then pass --cluster tcp://HOST:8786") from None
        self.address = address
        self.jobs = jobs
        self.worker = worker
        self._slots = (0.0, 1)

    def capacity(self) -> int:
        if self.jobs:
            return self.jobs
        checked, slots = self._slots
        if time.monotonic() - checked > 2.0:
            try:
                slots = max(1, sum(self.client.nthreads().values()))
            except Exception:
                pass
            self._slots = (time.monotonic(), slots)
        return slots

    def submit(self, task: dict):
        return self.client.submit(self.worker, task, pure=False)

    def wait(self, handles, timeout: float):
        deadline = time.monotonic() + timeout
        while True:
            done = [h for h in handles if h.done()]
            if done or time.monotonic() >= deadline:
                return done
            time.sleep(0.05)

    def outcome(self, handle) -> dict:
        try:
            return handle.result()
        except Exception as exc:
            detail = " ".join(str(exc).split())[:200]
            return {"status": "failed", "error": f"the cluster could not bake it ({type(exc).__name__}: {detail})"}

    def restart(self) -> None:  # dask reschedules tasks of lost workers itself
        pass

    def abandon(self) -> None:
        pass

    def close(self, running=()) -> None:
        try:
            if running:
                self.client.cancel(list(running))
            self.client.close()
        except Exception:
            pass


__all__ = ["bake_asset", "LocalRunner", "ClusterRunner", "WorkerDied", "available_cores"]
