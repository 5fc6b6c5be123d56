"""Batch baking: every mesh under a folder, with a rules file, in parallel, incrementally.

``thickbake batch SRC -o OUT`` finds every ``.obj``, ``.glb``, ``.gltf`` and ``.ply`` below SRC
(hidden files and folders, and OUT itself when it lies inside SRC, are left out), takes each asset's
settings from the rules file (:mod:`thickbake.rules`; ``SRC/thickbake.toml`` unless ``--config``
names another) and bakes the assets that are not up to date.

Output layout
-------------
``SRC/<folders>/<stem>.<ext>`` becomes ``OUT/<folders>/<stem>.<measure>.png`` (``.tif`` with
``format = "tif"``; ``<measure>`` is thickness, transmittance or occlusion, so the name says what the map
holds) and its sidecar ``OUT/<folders>/<stem>.<measure>.json``.  The batch also writes
``OUT/report.json`` and ``OUT/report.html`` (:mod:`thickbake.report`) and keeps an empty lock file,
``OUT/.thickbake-batch.lock``, so that two batches cannot write into one folder at once.  Two sources
that would get the same map name (``leaf.obj`` beside ``leaf.glb``) both fail with a message.
Delivery keys add ``<stem>.volume.glb|.gltf`` (``write_gltf``) and ``<stem>.packed.png`` + ``.json``
(``pack``) beside the maps; they are written before the maps, and the maps' sidecars record their
checksums, so a missing or changed delivery file makes the asset out of date.  The assets of a
``shared_reach`` group are encoded together once all of them are baked (:func:`_finish_group`).

When an asset is up to date
---------------------------
It is skipped when its map and sidecar exist and the sidecar records

* the same thickbake version,
* the same input bytes (sha256 of the mesh file, and for a ``.gltf`` of its external buffers),
* the same *requested* settings (:meth:`BakeSettings.content_hash` of the settings as the rules give
  them, before mesh-relative defaults are filled in; threads and chunking do not count),
* and a map whose own sha256 is the one the sidecar lists.

The settings the bake resolves (reach, bias, padding from the bounding box) are a function of the
requested settings, the mesh bytes and the version, so these checks decide them too — without
loading a single mesh, which keeps a batch with nothing to do fast.  The map checksum catches a
map that was replaced by a run killed before it could write the matching sidecar.

Likewise an asset that failed with a user error (unreadable file, no UVs, ...) in the previous local
run, as ``report.json`` records, is not tried again while its bytes, its settings and the version are
unchanged: it is listed as failed with the same error, without a bake.  Crashes, internal errors and
failures on a cluster worker are always tried again.  ``--force`` bakes everything, failed assets included.

Parallelism
-----------
Assets are baked in a process pool of ``jobs`` processes, by default
``min(cores, assets to bake)``, each bake using ``max(1, cores // jobs)`` threads unless the rules set
``threads``.  Neither changes a map: every random stream derives from (seed, texel), so maps are
bit-identical for any jobs × threads split.  The per-asset worker, :func:`bake_asset`, is a pure
function — paths and a settings dict in, a result dict (map bytes, sidecar, thumbnail) out — and
only this process writes to OUT.  A bake that crashes its process (a segfault, the OOM killer) is
retried once on its own; if it crashes again it is recorded as failed, and the rest go on.  Pool
processes start from a fork server that has already imported the bake modules (where the platform
has one; ``spawn`` elsewhere): neither forks this possibly multi-threaded process, and the server
pays the imports once instead of once per process.  As with any process pool, a script that calls
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

import hashlib
import json
import os
import re
import signal
import threading
import time
from collections import deque
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath
from typing import Callable

from thickbake.version import __version__
from thickbake.errors import ThickbakeError
from thickbake.batch.rules import FORMATS, AssetOptions, RulesFile, find_rules_file, load_rules
from thickbake.batch.runners import ClusterRunner, LocalRunner, WorkerDied, available_cores, bake_asset
from thickbake.settings import BakeSettings, settings_from_mapping

#: Mesh files a batch picks up (matched case-insensitively).
BATCH_SUFFIXES = (".obj", ".glb", ".gltf", ".ply")
#: A source ``<stem>.<ext>`` is baked into ``<stem>`` + this tag + the map suffix.
MAP_TAG = ".thickness"  # the tag of the default measure; other measures use their own name
LOCK_NAME = ".thickbake-batch.lock"
#: Temporary files of :func:`thickbake.maps.files.atomic_write_bytes` (``.<name>.<random>.tmp``) for the
#: files a batch writes; only these are removed at start-up.
_TEMP_NAME = re.compile(r"^\..+\.(png|tif|tiff|exr|glb|gltf|json|html)\.[A-Za-z0-9_]+\.tmp$")
#: Work of loading and encoding an asset, in ray equivalents, added to each asset's share of the
#: progress bar so that many tiny bakes do not read as instant.
_ASSET_OVERHEAD_RAYS = 200_000
EXIT_OK, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 130


@dataclass
class AssetJob:
    """One asset of a batch and what became of it.

    Attributes
    ----------
    rel : str
        Source path relative to SRC, POSIX separators.
    source : Path
        Absolute source path.
    map_rel : str
        Map path relative to OUT, POSIX separators (the sidecar is beside it, ``.json``), when the
        asset makes one map; an asset of several materials, UV sets or UDIM tiles makes several,
        named by :mod:`thickbake.maps.naming` in the same folder.
    maps : list of dict
        After baking or skipping: every map of the asset, ``map`` and ``sidecar`` paths relative to
        OUT, the sidecar's content (``data``) and a ``thumbnail`` (PNG bytes, fresh bakes only).
    options : AssetOptions
        Settings, format and matching rules from the rules file.
    status : str
        ``"bake"`` (planned), then ``"baked"``, ``"skipped"``, ``"failed"`` or ``"not started"``.
    reason : str
        Why it is baked (``"no map yet"``, ``"the mesh changed"``, ...) or skipped (``"up to date"``).
    """

    rel: str
    source: Path
    map_rel: str
    options: AssetOptions
    requested_hash: str
    input_sha256: str | None = None
    inputs_sha256: str | None = None
    status: str = "bake"
    reason: str = ""
    error: str | None = None
    traceback: str | None = None
    sidecar: dict | None = None
    thumbnail: bytes | None = None
    worker_seconds: float | None = None
    threads: int | None = None
    worker: str | None = None
    warnings: list = field(default_factory=list)
    failure_kind: str | None = None
    cost: float = 1.0
    attempts: int = 0
    solo: bool = False
    maps: list = field(default_factory=list)
    transfer: dict = field(default_factory=dict)
    outputs: dict = field(default_factory=dict)

    @property
    def sidecar_rel(self) -> str:
        return PurePosixPath(self.map_rel).with_suffix(".json").as_posix()


@dataclass
class BatchPlan:
    """Everything decided before baking: the rules, the assets, what to bake and why."""

    src: Path
    out: Path
    rules: RulesFile
    jobs: list[AssetJob]
    unused_rules: list
    warnings: list[str] = field(default_factory=list)

    def to_bake(self) -> list[AssetJob]:
        return [j for j in self.jobs if j.status == "bake"]


@dataclass
class BatchOutcome:
    plan: BatchPlan
    report: dict | None
    exit_code: int
    jobs_used: int = 0
    threads: int | None = None
    seconds: float = 0.0
    interrupted: bool = False
    #: One line when report.json/report.html could not be written (then the exit code is 1).
    report_error: str | None = None


# ---------------------------------------------------------------------------- planning
def find_meshes(src: Path, out: Path | None = None, warnings: list[str] | None = None) -> list[str]:
    """Relative POSIX paths of the mesh files under ``src``, sorted.

    Hidden files and folders (name starting with ``.``) are skipped, and so is ``out`` when it lies
    inside ``src``.  Symbolic links to folders are not followed; a link to a file outside ``src`` is
    skipped with a line appended to ``warnings`` (the batch opens nothing outside its folder).  A
    link that leads nowhere, or a FIFO or device named like a mesh, is listed: its bake fails with
    a message.
    """
    src = Path(src).resolve()
    out_resolved = Path(out).resolve() if out is not None else None
    found = []
    for dirpath, dirnames, filenames in os.walk(src):
        here = Path(dirpath)
        dirnames[:] = sorted(d for d in dirnames if not d.startswith(".")
                             and (out_resolved is None or (here / d).resolve() != out_resolved))
        for name in filenames:
            if not name.startswith(".") and os.path.splitext(name)[1].lower() in BATCH_SUFFIXES:
                rel = (here / name).relative_to(src).as_posix()
                if not is_inside(here / name, src):
                    if warnings is not None:
                        warnings.append(f"{rel}: skipped, it is a link to {os.path.realpath(here / name)}, outside "
                                        f"{src} (a batch reads nothing outside its folder; copy the file in instead)")
                    continue
                found.append(rel)
    return sorted(found)


def is_inside(path: Path, folder: Path) -> bool:
    """True when ``path``, with every link resolved (without opening anything), lies inside ``folder``."""
    target = Path(os.path.realpath(path))
    root = Path(os.path.realpath(folder))
    return target == root or root in target.parents


def map_name(rel: str, fmt: str, measure: str = "thickness") -> str:
    """Map path relative to OUT for a source path relative to SRC: ``a/b/leaf.obj`` → ``a/b/leaf.thickness.png``."""
    path = PurePosixPath(rel)
    return path.with_name(f"{path.stem}.{measure}{FORMATS[fmt]}").as_posix()


def input_digests(path: Path) -> tuple[str, str]:
    """(sha256 of the file, sha256 over the file and everything it loads geometry from).

    A ``.gltf`` keeps its vertex data in external ``.bin`` buffers; their bytes count as input too.
    For every other file the two digests are equal.

    Only regular files are read (a FIFO or device raises :class:`ThickbakeError` without being
    opened), and a buffer is hashed only when it lies inside the ``.gltf`` file's folder: a URI that
    escapes it (``..``, an absolute path, ``file:``, a link leading out) raises ThickbakeError, as
    the bake would.
    """
    from thickbake.pipeline.load import file_sha256
    from thickbake.inputs import confined_path, read_regular_file

    if path.suffix.lower() != ".gltf":
        main = file_sha256(path)
        return main, main
    data = read_regular_file(path)
    main = hashlib.sha256(data).hexdigest()
    try:
        buffers = json.loads(data.decode("utf-8")).get("buffers", [])
    except (ValueError, AttributeError, RecursionError):
        return main, main  # the bake will report the broken file
    digest = hashlib.sha256(main.encode())
    for buffer in buffers if isinstance(buffers, list) else []:
        uri = buffer.get("uri") if isinstance(buffer, dict) else None
        if not isinstance(uri, str) or uri.startswith("data:"):
            continue
        target = confined_path(path.parent, uri, path)
        digest.update(uri.encode())
        digest.update(file_sha256(target).encode() if target.exists() else b"missing")
    return main, digest.hexdigest()


def plan_batch(src, out, config=None, force: bool = False) -> BatchPlan:
    """Validate the arguments and the rules, find the assets and decide which need baking.

    Reads only: nothing is written.  Raises :class:`ThickbakeError` for bad arguments or rules,
    before any asset is baked.
    """
    src = Path(src)
    out = Path(out)
    if not src.exists():
        raise ThickbakeError("no such folder", path=src, fix="give the folder that holds your meshes")
    if not src.is_dir():
        raise ThickbakeError("is a file, not a folder", path=src,
                             fix="use 'thickbake bake MESH -o OUT.png' for one mesh")
    if out.exists() and not out.is_dir():
        raise ThickbakeError("the output is a file, not a folder", path=out, fix="give a folder for the maps")
    if out.resolve() == src.resolve():
        raise ThickbakeError("the output folder is the source folder", path=out,
                             fix="give another folder, e.g. -o maps (it may lie inside the source folder)")
    rules = load_rules(find_rules_file(src, config))
    warnings: list[str] = []
    rels = find_meshes(src, out, warnings)
    src_abs = src.resolve()
    jobs = []
    for rel in rels:
        options = rules.options_for(rel)
        settings, _ = settings_from_mapping(options.settings)
        transfer = options.transfer_inputs(rel)
        job = AssetJob(rel=rel, source=src_abs / rel, map_rel=map_name(rel, options.format, settings.measure),
                       options=options, requested_hash=_requested_hash(settings, transfer, options),
                       cost=_bake_cost(settings) * (1 + len(set((options.delivery.get("pack") or {}).values())
                                                            - {settings.measure})), transfer=transfer)
        _plan_outputs(job)
        jobs.append(job)
    # a mesh that an asset measures in (its source or cage) is an input, not an asset of its own
    inputs = {p for job in jobs for p in job.transfer.get("source", []) + [job.transfer.get("cage")] if p}
    jobs = [job for job in jobs if job.rel not in inputs]
    plan = BatchPlan(src=src_abs, out=out.resolve(), rules=rules, jobs=jobs, unused_rules=rules.unused_rules(rels),
                     warnings=warnings)
    _mark_name_clashes(plan.jobs)
    _mark_up_to_date(plan, force)
    return plan


def _requested_hash(settings: BakeSettings, transfer: dict, options: AssetOptions | None = None) -> str:
    """The settings hash, joined with the transfer's inputs (source and cage names, search distance) and
    the delivery options when there are any (so that changing them rebakes, while a batch without them
    keeps the hashes earlier versions recorded)."""
    delivery = options.delivery if options is not None else {}
    if not transfer and not delivery:
        return settings.content_hash()
    parts = {"settings": settings.content_hash()}
    if transfer:
        parts["transfer"] = transfer
    if delivery:
        parts["delivery"] = delivery
    blob = json.dumps(parts, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()


def _transfer_digest(src: Path, inputs_sha256: str, transfer: dict) -> str:
    """``inputs_sha256`` of an asset folded with the bytes of its source and cage files."""
    digest = hashlib.sha256(inputs_sha256.encode())
    for rel in transfer["source"] + ([transfer["cage"]] if transfer.get("cage") else []):
        path = src / rel
        if not is_inside(path, src):  # a batch reads nothing outside its folder
            raise ThickbakeError(f"the source or cage mesh {rel!r} lies outside {src}", path=path,
                                 fix="keep the meshes an asset is measured in inside the batch's source folder")
        digest.update(rel.encode())
        digest.update(input_digests(path)[1].encode() if path.exists() or path.is_symlink() else b"missing")
    return digest.hexdigest()


def _plan_outputs(job: AssetJob) -> None:
    """Names (in the map's folder) of the files the delivery options add: ``<stem>.volume.glb|.gltf``
    for a glTF copy, ``<stem>.packed.png`` (+ ``.json``) for packed channels."""
    delivery = job.options.delivery
    stem = PurePosixPath(job.rel).stem
    suffix = PurePosixPath(job.rel).suffix.lower()
    if delivery.get("write_gltf"):
        if suffix not in (".glb", ".gltf"):
            job.status, job.failure_kind = "failed", "user"
            job.error = (f"{job.source}: write_gltf applies to glTF sources (.glb/.gltf), this is {suffix}; limit "
                         "the rule that sets it with match = \"**/*.glb\" or similar")
        job.outputs["gltf"] = f"{stem}.volume{suffix}"
    if delivery.get("pack"):
        job.outputs["packed"] = f"{stem}.packed.png"


def _bake_cost(settings: BakeSettings) -> float:
    rays = 1 if settings.cone == 0 else settings.rays
    return settings.width * settings.height * settings.supersample ** 2 * rays + _ASSET_OVERHEAD_RAYS


def _mark_name_clashes(jobs: list[AssetJob]) -> None:
    by_name: dict[str, list[AssetJob]] = {}
    for job in jobs:
        by_name.setdefault(job.map_rel.lower(), []).append(job)
    for group in by_name.values():
        if len(group) > 1:
            for job in group:
                others = ", ".join(o.rel for o in group if o is not job)
                job.status = "failed"
                job.error = (f"{job.rel}: would be baked into {job.map_rel}, like {others}; "
                             "rename one of them (the map name drops the mesh file's suffix)")


def _shared_groups(jobs) -> dict[str, list[AssetJob]]:
    groups: dict[str, list[AssetJob]] = {}
    for job in jobs:
        name = job.options.delivery.get("shared_reach")
        if name and job.status == "bake":
            groups.setdefault(name, []).append(job)
    return groups


def _mark_up_to_date(plan: BatchPlan, force: bool) -> None:
    # a shared-reach group is up to date only as a whole: each member's hash covers every member's input
    for name, members in _shared_groups(plan.jobs).items():
        keys = []
        for job in members:
            try:
                keys.append([job.rel, input_digests(job.source)[1]])
            except OSError:
                keys.append([job.rel, None])
        blob = json.dumps({"group": name, "members": sorted(keys, key=str)}, sort_keys=True)
        for job in members:
            job.requested_hash = hashlib.sha256((job.requested_hash + blob).encode()).hexdigest()
    _mark_each_up_to_date(plan, force)
    groups: dict[str, list[AssetJob]] = {}
    for job in plan.jobs:
        name = job.options.delivery.get("shared_reach")
        if name and job.status in ("bake", "skipped"):
            groups.setdefault(name, []).append(job)
    for members in groups.values():
        if any(j.status == "bake" for j in members):
            for job in members:
                if job.status == "skipped":
                    job.status, job.reason = "bake", "another asset of its shared-reach group is baked"


def _mark_each_up_to_date(plan: BatchPlan, force: bool) -> None:
    failed_before = {} if force else _previous_user_failures(plan.out)
    for job in plan.jobs:
        if job.status != "bake":
            continue
        try:
            job.input_sha256, job.inputs_sha256 = input_digests(job.source)
            if job.transfer:
                job.inputs_sha256 = _transfer_digest(plan.src, job.inputs_sha256, job.transfer)
        except ThickbakeError as exc:
            job.status, job.failure_kind = "failed", "user"
            job.error = exc.one_line()
            continue
        except OSError as exc:
            job.status, job.failure_kind = "failed", "user"
            job.error = f"{job.source}: cannot read the file ({exc.strerror or exc}); check its permissions"
            continue
        if force:
            job.reason = "--force"
            continue
        reason = _outdated_reason(job, plan.out)
        before = failed_before.get(job.rel)
        if reason is None:
            job.status = "skipped"
            job.reason = "up to date"
        elif (before and before.get("inputs_sha256") == job.inputs_sha256
              and before.get("requested_settings_hash") == job.requested_hash):
            job.status, job.failure_kind = "failed", "user"
            job.error = before.get("error") or "failed in the previous run"
            job.reason = "unchanged since it failed in the previous run; --force tries again"
        else:
            job.reason = reason


def _previous_user_failures(out: Path) -> dict[str, dict]:
    """Rows of the previous ``report.json`` that failed with a user error, by source path."""
    from thickbake.batch.report import REPORT_JSON

    if not (out / REPORT_JSON).is_file():  # (never open a FIFO or a folder in its place)
        return {}
    try:
        previous = json.loads((out / REPORT_JSON).read_text("utf-8"))
        if previous.get("thickbake_version") != __version__:
            return {}
        return {row["source"]: row for row in previous.get("assets", [])
                if row.get("status") == "failed" and row.get("failure_kind") == "user"}
    except (OSError, ValueError, AttributeError, KeyError, TypeError):
        return {}


def _outdated_reason(job: AssetJob, out: Path) -> str | None:
    """None when the outputs on disk are up to date (``job.maps`` and ``job.sidecar`` are then set), else why not.

    The maps of an asset are found through their sidecars (``<stem>.*.json`` in the map's folder
    whose ``batch.source`` is this asset); each lists every map of its asset under ``batch.maps``.
    """
    from thickbake.maps.sidecar import BatchRecord, parse_sidecar
    from thickbake.pipeline.load import file_sha256

    found = _asset_sidecars(job, out)
    if not found:
        return "no map yet"
    names = found[0][1].get("batch", {}).get("maps") or [PurePosixPath(job.map_rel).name]
    folder = PurePosixPath(job.map_rel).parent
    expected = {PurePosixPath(n).with_suffix(".json").name for n in names}
    if {side.name for side, _ in found} != expected:
        return "the asset's set of maps is incomplete"
    by_name = {side.name: data for side, data in found}
    maps = []
    for name in names:
        data = by_name[PurePosixPath(name).with_suffix(".json").name]
        try:
            side = parse_sidecar(data, out / folder / name)
        except ThickbakeError:
            return "the sidecar is unreadable"
        batch = side.batch or BatchRecord(None, None, None)
        if side.version != __version__:
            return f"baked by thickbake {data.get('thickbake_version')}, this is {__version__}"
        if side.input_sha256 != job.input_sha256 or batch.inputs_sha256 != job.inputs_sha256:
            return "the mesh changed"
        if batch.requested_settings_hash != job.requested_hash:
            return "the settings changed"
        map_rel = (folder / name).as_posix()
        if not (out / map_rel).is_file():
            return "no map yet"
        try:
            digest = file_sha256(out / map_rel)
        except (OSError, ThickbakeError):
            return "the map is unreadable"
        if digest != batch.map_sha256 or (side.map_sha256 or digest) != digest:
            return "the map does not match its sidecar"
        maps.append({"map": map_rel, "sidecar": PurePosixPath(map_rel).with_suffix(".json").as_posix(), "data": data,
                     "thumbnail": None})
    recorded = found[0][1].get("batch") if isinstance(found[0][1].get("batch"), dict) else {}
    outputs = recorded.get("outputs") if isinstance(recorded.get("outputs"), dict) else {}
    for name, digest in outputs.items():  # delivery files (glTF copy, packed image) beside the maps
        try:
            if file_sha256(out / folder / name) != digest:
                return f"{name} does not match the sidecar"
        except OSError:
            return f"{name} is missing"
    job.maps = maps
    job.sidecar = maps[0]["data"]
    return None


def _asset_sidecars(job: AssetJob, out: Path) -> list[tuple[Path, dict]]:
    """(path, content) of the sidecars in OUT that a batch wrote for this asset, sorted by name."""
    folder = (out / job.map_rel).parent
    stem = PurePosixPath(job.rel).stem
    found = []
    try:
        candidates = sorted(folder.glob(f"{_glob_escape(stem)}.*.json"))
    except OSError:
        return []
    for side in candidates:
        if not side.is_file():  # never open a FIFO or a folder named like a sidecar
            continue
        try:
            data = json.loads(side.read_text("utf-8"))
        except (OSError, ValueError):
            if side.name == PurePosixPath(job.sidecar_rel).name:
                found.append((side, {}))
            continue
        if isinstance(data, dict) and isinstance(data.get("batch"), dict) and data["batch"].get("source") == job.rel:
            found.append((side, data))
    return found


def _glob_escape(text: str) -> str:
    return "".join(f"[{c}]" if c in "*?[" else c for c in text)


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


# ---------------------------------------------------------------------------- running
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
    for rule in plan.unused_rules:
        notify(f"warning: {plan.rules.path}: {rule.label()} matches no asset")
    for text in plan.warnings:
        notify(f"warning: {text}")
    for job in plan.jobs:  # refused while planning (unreadable, FIFO, URI outside its folder, name clash)
        if job.status == "failed" and not job.reason:
            notify(f"failed: {job.rel}: {job.error}")
    todo = plan.to_bake()
    cores = available_cores()
    runner = None
    if todo and cluster:
        runner = ClusterRunner(cluster, jobs, worker)  # a bad address is an argument error: nothing written yet
    try:
        try:
            plan.out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ThickbakeError(f"cannot create the output folder ({exc.strerror or exc})", path=plan.out,
                                 fix="check the path and its permissions") from None
        with _output_lock(plan.out):
            clean_temp_files(plan.out, keep=plan.src)
            if cluster:
                jobs_used = runner.capacity() if runner else 0
                threads = None
            else:
                jobs_used = min(jobs or cores, len(todo))
                threads = max(1, cores // jobs_used) if jobs_used else None
                runner = LocalRunner(jobs_used, worker) if todo else None
            interrupted = False
            if todo:
                interrupted = _run_jobs(plan, todo, runner, threads, progress, notify)
            from thickbake.batch.report import batch_thumbnails, build_report, write_reports

            shown = {}
            if previews and not interrupted:
                from thickbake.batch.previews import batch_previews

                shown = batch_previews(plan, stills=True, notify=notify, progress=progress)
            report = build_report(plan, started_at, time.perf_counter() - started, cores, jobs_used, threads,
                                  cluster, force, interrupted, shown)
            report_error = None
            try:
                write_reports(plan.out, report, batch_thumbnails(plan), {k: v["still"] for k, v in shown.items()})
            except OSError as exc:
                # the maps and sidecars are written and consistent; only the summary is missing
                report_error = (f"{plan.out}: cannot write the report ({exc.strerror or exc}); the maps are written, "
                                "free some space or fix the folder's permissions and run the batch again to get it")
            except ThickbakeError as exc:
                report_error = exc.one_line()
    finally:
        if runner is not None:
            runner.close()
    failed = any(j.status == "failed" for j in plan.jobs) or report_error is not None
    code = EXIT_INTERRUPTED if interrupted else (EXIT_FAILED if failed else EXIT_OK)
    return BatchOutcome(plan=plan, report=report, exit_code=code, jobs_used=jobs_used, threads=threads,
                        seconds=time.perf_counter() - started, interrupted=interrupted, report_error=report_error)


def _run_jobs(plan: BatchPlan, todo: list[AssetJob], runner, threads: int | None,
              progress, notify) -> bool:
    """Schedule the bakes, write each result as it arrives; returns True when interrupted."""
    pending = deque(sorted(todo, key=lambda j: (-j.cost, j.rel)))  # largest first balances the pool
    running: dict = {}
    total_cost = sum(j.cost for j in todo)
    tally = {"cost": 0.0, "rays": 0, "done": 0, "failed": 0}

    group_left: dict[str, int] = {}
    for job in todo:
        name = job.options.delivery.get("shared_reach")
        if name:
            group_left[name] = group_left.get(name, 0) + 1
    held: dict[str, list] = {}

    def finish(job: AssetJob, result: dict) -> None:
        name = job.options.delivery.get("shared_reach")
        if name:
            group_left[name] -= 1
            if result.get("status") == "baked":
                held.setdefault(name, []).append((job, result))
            else:
                finish_one(job, result)
            if group_left[name] == 0:
                for member, outcome in _finish_group(plan, name, held.pop(name, []), threads):
                    finish_one(member, outcome)
            return
        finish_one(job, result)

    def finish_one(job: AssetJob, result: dict) -> None:
        _apply_result(plan.out, job, result)
        tally["cost"] += job.cost
        tally["done"] += 1
        if job.status == "failed":
            tally["failed"] += 1
            notify(f"failed: {job.rel}: {job.error}")
        else:
            tally["rays"] += sum(int(m["data"].get("rays_traced", 0)) for m in job.maps)
        if progress is not None:
            note = f" {tally['done']}/{len(todo)} assets" + (f", {tally['failed']} failed" if tally["failed"] else "")
            progress(tally["cost"] / total_cost, tally["rays"], note)

    with _Interrupts(notify) as interrupts:
        try:
            while pending or running:
                if interrupts.count:
                    interrupts.announce_once()
                    for job in pending:
                        job.status, job.reason = "not started", "interrupted before it started"
                    pending.clear()
                while pending and len(running) < runner.capacity():
                    if running and (pending[0].solo or any(j.solo for j in running.values())):
                        break  # a suspect of a crash runs alone
                    job = pending.popleft()
                    running[runner.submit(_task(plan, job, threads))] = job
                if not running:
                    continue
                died = []
                for handle in runner.wait(list(running), 0.25):
                    job = running.pop(handle)
                    try:
                        finish(job, runner.outcome(handle))
                    except WorkerDied:
                        died.append(job)
                if died:
                    # the whole pool is gone: collect every bake that was in it, then start afresh
                    for handle in list(running):
                        job = running.pop(handle)
                        try:
                            finish(job, runner.outcome(handle))
                        except WorkerDied:
                            died.append(job)
                    runner.restart()
                    for job in reversed(died):
                        job.attempts += 1
                        if job.solo or len(died) == 1:
                            finish(job, {"status": "failed", "failure": "crash",
                                         "error": f"{job.source}: the bake process died "
                                                  "(crashed or killed, e.g. out of memory); try a smaller size"})
                        else:
                            job.solo = True
                            pending.appendleft(job)
        except KeyboardInterrupt:
            runner.abandon()
            for job in todo:  # in flight, queued, or caught between its two writes
                if job.status == "bake":
                    job.status, job.reason = "not started", "abandoned by a second interrupt before it was written"
            return True
    for items in held.values():  # groups cut short by an interrupt: nothing of theirs is written
        for job, _ in items:
            job.status, job.reason = "not started", "its shared-reach group did not finish (interrupted)"
    return interrupts.count > 0


def _finish_group(plan: BatchPlan, name: str, items: list, threads: int | None) -> list:
    """Encode the baked members of a shared-reach group with one reach: the largest of their fitted
    reaches (``reach = "fit"``), so every map of the group decodes with the same factor."""
    from thickbake.batch.runners import task_outputs
    from thickbake.pipeline.finish import with_reach

    if not items:
        return []
    fitted = {job.rel: max(r.settings.reach for r in result["deferred"]["baked"]["thickness"])
              for job, result in items}
    reach = max(fitted.values())
    record = {"group": name, "reach": reach, "members": sorted(fitted), "rule": "largest fitted reach of the members"}
    out = []
    for job, result in items:
        deferred = result["deferred"]
        baked = dict(deferred["baked"])
        baked["thickness"] = [with_reach(r, reach, record) for r in baked["thickness"]]
        try:
            outcome = task_outputs(_task(plan, job, threads), baked, deferred["volume_plan"])
        except ThickbakeError as exc:
            outcome = {"status": "failed", "error": exc.one_line(), "failure": "user"}
        except Exception as exc:  # a bug: this asset fails with its traceback, the batch goes on
            import traceback

            outcome = {"status": "failed", "failure": "internal", "traceback": traceback.format_exc(),
                       "error": f"{job.source}: internal error ({type(exc).__name__}: {exc}); please report it"}
        else:
            outcome.update(status="baked", threads=result.get("threads"), worker=result.get("worker"),
                           worker_seconds=result.get("worker_seconds"),
                           warnings=list(result.get("warnings") or []) + outcome.pop("delivery_warnings"))
        out.append((job, outcome))
    return out


def _task(plan: BatchPlan, job: AssetJob, threads: int | None) -> dict:
    return {
        "delivery": dict(job.options.delivery),
        "outputs": dict(job.outputs),
        "out_dir": str((plan.out / job.map_rel).parent),
        "source": str(job.source),
        "map_name": PurePosixPath(job.map_rel).name,
        "format": job.options.format,
        "settings": dict(job.options.settings),
        "threads": threads,
        "transfer": {"source": [str(plan.src / p) for p in job.transfer["source"]],
                     "cage": str(plan.src / job.transfer["cage"]) if job.transfer.get("cage") else None,
                     "search_distance": job.transfer.get("search_distance")} if job.transfer else {},
        "batch": {"source": job.rel, "requested_settings_hash": job.requested_hash,
                  "inputs_sha256": job.inputs_sha256, "rules": list(job.options.rules)},
    }


def _apply_result(out: Path, job: AssetJob, result: dict) -> None:
    """Record a worker's result on the job and write its maps and sidecars (each sidecar after its map).

    Maps of an earlier bake of the same asset that this bake no longer makes (the asset lost a
    material or a tile) are removed, so the folder holds exactly the asset's current maps.
    """
    from thickbake.maps.files import atomic_write_bytes, write_map

    job.worker_seconds = result.get("worker_seconds")
    job.threads = result.get("threads")
    job.worker = result.get("worker")
    job.warnings = result.get("warnings") or []
    if result.get("status") != "baked":
        job.status = "failed"
        job.error = result.get("error") or "unknown error"
        job.failure_kind = result.get("failure") or "internal"
        job.traceback = result.get("traceback")
        return
    folder = PurePosixPath(job.map_rel).parent
    stale = {side for side, _ in _asset_sidecars(job, out)}
    maps = []
    try:
        for name, blob in (result.get("extra_files") or {}).items():  # delivery files before the maps
            try:
                atomic_write_bytes(out / folder / name, blob)
            except OSError as exc:
                raise ThickbakeError(f"cannot write {name} ({exc.strerror or exc})", path=out / folder / name,
                                     fix="check the folder is writable and has free space") from None
        for item in result["maps"]:
            map_rel = (folder / item["name"]).as_posix()
            side_rel = PurePosixPath(map_rel).with_suffix(".json").as_posix()
            write_map(out / map_rel, item["map_bytes"], item["sidecar"])  # sidecar last, atomic each
            stale.discard(out / side_rel)
            maps.append({"map": map_rel, "sidecar": side_rel, "data": item["sidecar"], "thumbnail": item.get("thumbnail")})
    except ThickbakeError as exc:
        job.status = "failed"
        job.error = exc.one_line()
        return
    for side in stale:
        for path in (side, side.with_suffix(Path(job.map_rel).suffix)):
            try:
                path.unlink()
            except OSError:
                pass
    job.status = "baked"
    job.maps = maps
    job.sidecar = maps[0]["data"]
    job.thumbnail = maps[0]["thumbnail"]


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
        for name in filenames:
            if _TEMP_NAME.match(name):
                try:
                    os.unlink(here / name)
                    removed += 1
                except OSError:
                    pass
    return removed


# ---------------------------------------------------------------------------- command line
def format_plan(plan: BatchPlan) -> list[str]:
    """Lines of ``--dry-run``: per asset what would happen, why, and its resolved settings."""
    lines = []
    for job in plan.jobs:
        action = {"bake": "bake", "skipped": "skip", "failed": "fail"}.get(job.status, job.status)
        # an up-to-date asset of several maps (materials, tiles) lists them all; before a bake the
        # mesh is not loaded, so only the single-map name is known
        target = ", ".join(m["map"] for m in job.maps) if len(job.maps) > 1 else job.map_rel
        if job.status == "failed":
            lines.append(f"{job.rel} -> {target}: {action}" + (f" ({job.reason})" if job.reason else "")
                         + f": {job.error}")
        else:
            lines.append(f"{job.rel} -> {target}: {action} ({job.reason})")
        content, run = settings_from_mapping(job.options.settings)
        settings = {**content.to_dict(), **run.to_dict()}
        shown = " ".join(f"{k}={_setting_text(k, v)}" for k, v in settings.items())
        rules = ", ".join(f"#{n}" for n in job.options.rules) or "none"
        lines.append(f"    format={job.options.format} {shown}  [rules: {rules}]")
        if job.transfer:
            how = (f"cage {job.transfer['cage']}" if job.transfer.get("cage") else
                   f"search distance {job.transfer['search_distance'] or 'default'}")
            lines.append(f"    measured in {', '.join(job.transfer['source'])} ({how})")
    to_bake = len(plan.to_bake())
    skipped = sum(1 for j in plan.jobs if j.status == "skipped")
    failed = sum(1 for j in plan.jobs if j.status == "failed")
    lines.append(f"dry run: {len(plan.jobs)} assets under {plan.src}: {to_bake} would be baked, {skipped} skipped"
                 + (f", {failed} would fail" if failed else "") + "; nothing was written")
    return lines


def _setting_text(key: str, value) -> str:
    if value is None:
        return "off" if key == "target_error" else "auto"
    if key == "size":
        return f"{value[0]}x{value[1]}"
    if isinstance(value, bool):
        return str(value).lower()
    return str(value)


def summary_line(outcome: BatchOutcome) -> str:
    """The last line a batch prints on stdout."""
    totals = outcome.report["totals"]
    parts = [f"{totals['baked']} baked", f"{totals['skipped']} skipped", f"{totals['failed']} failed"]
    if totals["not_started"]:
        parts.append(f"{totals['not_started']} not started (interrupted)")
    extra = ""
    if totals.get("maps", 0) > totals["baked"] + totals["skipped"]:
        extra += f" ({totals['maps']} maps)"
    if totals.get("warnings"):
        extra += f", {totals['warnings']} warning{'s' if totals['warnings'] != 1 else ''} (see the report)"
    how = ""
    if outcome.jobs_used:
        how = f", {outcome.jobs_used} job{'s' if outcome.jobs_used != 1 else ''}"
        if outcome.threads:
            how += f" x {outcome.threads} thread{'s' if outcome.threads != 1 else ''}"
        else:
            how += " on the cluster"
    report = f"report {outcome.plan.out / 'report.html'}" if outcome.report_error is None else "no report (see the error)"
    return f"batch: {', '.join(parts)} of {totals['assets']} assets{extra} in {outcome.seconds:.1f} s{how}; {report}"


__all__ = ["run_batch", "plan_batch", "bake_asset", "find_meshes", "map_name", "input_digests", "clean_temp_files",
           "format_plan", "summary_line", "AssetJob", "BatchPlan", "BatchOutcome",
           "MAP_TAG", "BATCH_SUFFIXES"]
