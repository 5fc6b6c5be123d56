"""What a batch will do: find the meshes under a folder, give each its settings and decide what needs baking.

``thickbake batch SRC -o OUT`` finds every ``.obj``, ``.glb``, ``.gltf`` and ``.ply`` below SRC
(hidden files and folders, and OUT itself when it lies inside SRC, are left out), takes each asset's
settings from the rules file (:mod:`thickbake.batch.rules`; ``SRC/thickbake.toml`` unless ``--config``
names another) and bakes the assets that are not up to date.  This module decides what to do
(:func:`plan_batch` only reads, it writes nothing); :mod:`thickbake.batch.schedule` does it.

Output layout
-------------
``SRC/<folders>/<stem>.<ext>`` becomes ``OUT/<folders>/<stem>.<measure>.png`` (``.tif`` with
``format = "tif"``; ``<measure>`` is thickness, transmittance or occlusion, so the name says what the map
holds) and its sidecar ``OUT/<folders>/<stem>.<measure>.json``.  The batch also writes
``OUT/report.json`` and ``OUT/report.html`` (:mod:`thickbake.batch.report`) and keeps an empty lock file,
``OUT/.thickbake-batch.lock``, so that two batches cannot write into one folder at once.  Two sources
that would get the same map name (``leaf.obj`` beside ``leaf.glb``) both fail with a message.
Delivery keys add ``<stem>.volume.glb|.gltf`` (``write_gltf``) and ``<stem>.packed.png`` + ``.json``
(``pack``) beside the maps; they are written before the maps, and the maps' sidecars record their
checksums, so a missing or changed delivery file makes the asset out of date.  The assets of a
``shared_reach`` group are encoded together once all of them are baked
(:func:`thickbake.batch.schedule.finish_group`).

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
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from thickbake.version import __version__
from thickbake.errors import ThickbakeError
from thickbake.batch.rules import FORMATS, AssetOptions, RulesFile, find_rules_file, load_rules
from thickbake.settings import BakeSettings, settings_from_mapping

#: Mesh files a batch picks up (matched case-insensitively).
BATCH_SUFFIXES = (".obj", ".glb", ".gltf", ".ply")
#: A source ``<stem>.<ext>`` is baked into ``<stem>`` + this tag + the map suffix.
MAP_TAG = ".thickness"  # the tag of the default measure; other measures use their own name
#: Work of loading and encoding an asset, in ray equivalents, added to each asset's share of the
#: progress bar so that many tiny bakes do not read as instant.
_ASSET_OVERHEAD_RAYS = 200_000


@dataclass
class PlannedAsset:
    """What the plan decided for one source mesh: where it is, where its maps go and with which settings.

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
    options : AssetOptions
        Settings, format, delivery keys and matching rules from the rules file.
    requested_hash : str
        Hash of the settings as requested, joined with the transfer inputs and delivery options
        (and, in a shared-reach group, every member's input): recorded in the sidecar, compared to
        decide whether the asset is up to date.
    transfer : dict
        ``source`` and ``cage`` relative to SRC and ``search_distance``, when the asset is measured in
        another mesh (:meth:`AssetOptions.transfer_inputs`); else empty.
    outputs : dict
        Names, in the map's folder, of the delivery files: ``gltf`` (the glTF copy), ``packed`` (the
        packed PNG).
    input_sha256, inputs_sha256 : str or None
        sha256 of the mesh file, and over everything the bake reads (a ``.gltf``'s buffers, a
        transfer's source and cage); None until the up-to-date check reads them.
    """

    rel: str
    source: Path
    map_rel: str
    options: AssetOptions
    requested_hash: str
    transfer: dict = field(default_factory=dict)
    outputs: dict = field(default_factory=dict)
    input_sha256: str | None = None
    inputs_sha256: str | None = None

    @property
    def sidecar_rel(self) -> str:
        return PurePosixPath(self.map_rel).with_suffix(".json").as_posix()


@dataclass
class AssetResult:
    """What became of an asset: its maps (baked in this run or found up to date) or why it failed.

    Attributes
    ----------
    maps : list of dict
        Every map of the asset: ``map`` and ``sidecar`` paths relative to OUT, the sidecar's content
        (``data``) and a ``thumbnail`` (PNG bytes, fresh bakes only; None for a skipped map).
    error : str or None
        One line naming the file and the fix, when the asset failed.
    failure_kind : str or None
        ``"user"`` (fails again on the same input, so it is remembered), ``"user-remote"``,
        ``"internal"``, ``"resources"`` or ``"crash"`` (see :func:`thickbake.batch.runners.bake_asset`).
    traceback : str or None
        Internal errors only.
    warnings : list of str
        The worker's warnings (the report shows them for an asset without maps).
    worker_seconds : float or None
        Wall-clock seconds of the bake in its worker.
    threads : int or None
        Threads the bake used.
    worker : str or None
        Host name of the machine that baked it.
    """

    maps: list = field(default_factory=list)
    error: str | None = None
    failure_kind: str | None = None
    traceback: str | None = None
    warnings: list = field(default_factory=list)
    worker_seconds: float | None = None
    threads: int | None = None
    worker: str | None = None

    @property
    def sidecar(self) -> dict | None:
        """The content of the first map's sidecar (the asset's figures), or None without maps."""
        return self.maps[0]["data"] if self.maps else None


@dataclass
class QueueState:
    """The asset's place in the scheduler's queue.

    Attributes
    ----------
    cost : float
        Expected work in ray equivalents: the largest bakes start first, and the progress bar
        advances by each finished asset's share.
    attempts : int
        Bakes whose process died under it.
    solo : bool
        Suspected of crashing the pool: it runs alone.
    """

    cost: float = 1.0
    attempts: int = 0
    solo: bool = False


@dataclass
class AssetJob:
    """One asset of a batch: what was planned, how far it got, what became of it, and its place in the queue.

    Attributes
    ----------
    asset : PlannedAsset
    status : str
        ``"bake"`` (planned), then ``"baked"``, ``"skipped"``, ``"failed"`` or ``"not started"``.
    reason : str
        Why it is baked (``"no map yet"``, ``"the mesh changed"``, ...), skipped (``"up to date"``) or
        not started.
    result : AssetResult
    queue : QueueState
    """

    asset: PlannedAsset
    status: str = "bake"
    reason: str = ""
    result: AssetResult = field(default_factory=AssetResult)
    queue: QueueState = field(default_factory=QueueState)

    def fail(self, error: str, kind: str | None) -> None:
        """Mark the asset failed with a one-line ``error`` of ``kind`` (see :attr:`AssetResult.failure_kind`)."""
        self.status = "failed"
        self.result.error, self.result.failure_kind = error, kind


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


# ---------------------------------------------------------------------------- finding the meshes
def find_meshes(src: Path, out: Path | None = None, warnings: list[str] | None = None) -> list[str]:
    """Relative POSIX paths of the mesh files under ``src``, sorted.

    Hidden files and folders (name starting with ``.``) are skipped, and so is ``out`` when it lies
    inside ``src``.  Symbolic links to folders are not followed; a link to a file outside ``src`` is
    skipped with a line appended to ``warnings`` (the batch opens nothing outside its folder).  A
    link that leads nowhere, or a FIFO or device named like a mesh, is listed: its bake fails with
    a message.
    """
    src = Path(src).resolve()
    found = []
    for path in _mesh_files(src, Path(out).resolve() if out is not None else None):
        rel = path.relative_to(src).as_posix()
        if is_inside(path, src):
            found.append(rel)
        elif warnings is not None:
            warnings.append(f"{rel}: skipped, it is a link to {os.path.realpath(path)}, outside "
                            f"{src} (a batch reads nothing outside its folder; copy the file in instead)")
    return sorted(found)


def _mesh_files(src: Path, out: Path | None):
    """Paths of the files under ``src`` named like meshes, in walk order: hidden names and the folder
    ``out`` are left out, links to folders are not followed."""
    for dirpath, dirnames, filenames in os.walk(src):
        here = Path(dirpath)
        dirnames[:] = sorted(d for d in dirnames if not d.startswith(".")
                             and (out is None or (here / d).resolve() != out))
        yield from (here / name for name in filenames
                    if not name.startswith(".") and os.path.splitext(name)[1].lower() in BATCH_SUFFIXES)


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


# ---------------------------------------------------------------------------- planning
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
    jobs = [_plan_asset(rel, src_abs, rules.options_for(rel)) for rel in rels]
    # a mesh that an asset measures in (its source or cage) is an input, not an asset of its own
    inputs = {p for job in jobs for p in job.asset.transfer.get("source", []) + [job.asset.transfer.get("cage")] if p}
    jobs = [job for job in jobs if job.asset.rel not in inputs]
    plan = BatchPlan(src=src_abs, out=out.resolve(), rules=rules, jobs=jobs, unused_rules=rules.unused_rules(rels),
                     warnings=warnings)
    _mark_name_clashes(plan.jobs)
    _mark_up_to_date(plan, force)
    return plan


def _plan_asset(rel: str, src: Path, options: AssetOptions) -> AssetJob:
    """The job of the asset at ``rel`` (relative to the absolute folder ``src``) with the rules' ``options``."""
    settings, _ = settings_from_mapping(options.settings)
    transfer = options.transfer_inputs(rel)
    asset = PlannedAsset(rel=rel, source=src / rel, map_rel=map_name(rel, options.format, settings.measure),
                         options=options, requested_hash=_requested_hash(settings, transfer, options),
                         transfer=transfer)
    extra_measures = set((options.delivery.get("pack") or {}).values()) - {settings.measure}
    job = AssetJob(asset=asset, queue=QueueState(cost=_bake_cost(settings) * (1 + len(extra_measures))))
    _plan_outputs(job)
    return job


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
    asset = job.asset
    delivery = asset.options.delivery
    stem = PurePosixPath(asset.rel).stem
    suffix = PurePosixPath(asset.rel).suffix.lower()
    if delivery.get("write_gltf"):
        if suffix not in (".glb", ".gltf"):
            job.fail(f"{asset.source}: write_gltf applies to glTF sources (.glb/.gltf), this is {suffix}; limit "
                     "the rule that sets it with match = \"**/*.glb\" or similar", "user")
        asset.outputs["gltf"] = f"{stem}.volume{suffix}"
    if delivery.get("pack"):
        asset.outputs["packed"] = f"{stem}.packed.png"


def _bake_cost(settings: BakeSettings) -> float:
    rays = 1 if settings.cone == 0 else settings.rays
    return settings.width * settings.height * settings.supersample ** 2 * rays + _ASSET_OVERHEAD_RAYS


def _mark_name_clashes(jobs: list[AssetJob]) -> None:
    by_name: dict[str, list[AssetJob]] = {}
    for job in jobs:
        by_name.setdefault(job.asset.map_rel.lower(), []).append(job)
    for group in by_name.values():
        if len(group) > 1:
            for job in group:
                others = ", ".join(o.asset.rel for o in group if o is not job)
                job.status = "failed"  # (a failure kind set while planning stays)
                job.result.error = (f"{job.asset.rel}: would be baked into {job.asset.map_rel}, like {others}; "
                                    "rename one of them (the map name drops the mesh file's suffix)")


def _shared_groups(jobs) -> dict[str, list[AssetJob]]:
    groups: dict[str, list[AssetJob]] = {}
    for job in jobs:
        name = job.asset.options.delivery.get("shared_reach")
        if name and job.status == "bake":
            groups.setdefault(name, []).append(job)
    return groups


def _mark_up_to_date(plan: BatchPlan, force: bool) -> None:
    _hash_shared_groups(plan.jobs)
    _mark_each_up_to_date(plan, force)
    _rebake_whole_groups(plan.jobs)


def _hash_shared_groups(jobs: list[AssetJob]) -> None:
    """A shared-reach group is up to date only as a whole: each member's hash covers every member's input."""
    for name, members in _shared_groups(jobs).items():
        keys = []
        for job in members:
            try:
                keys.append([job.asset.rel, input_digests(job.asset.source)[1]])
            except OSError:
                keys.append([job.asset.rel, None])
        blob = json.dumps({"group": name, "members": sorted(keys, key=str)}, sort_keys=True)
        for job in members:
            job.asset.requested_hash = hashlib.sha256((job.asset.requested_hash + blob).encode()).hexdigest()


def _rebake_whole_groups(jobs: list[AssetJob]) -> None:
    """When one member of a shared-reach group is baked, the group's up-to-date members are baked too."""
    groups: dict[str, list[AssetJob]] = {}
    for job in jobs:
        name = job.asset.options.delivery.get("shared_reach")
        if name and job.status in ("bake", "skipped"):
            groups.setdefault(name, []).append(job)
    for members in groups.values():
        if not any(j.status == "bake" for j in members):
            continue
        for job in members:
            if job.status == "skipped":
                job.status, job.reason = "bake", "another asset of its shared-reach group is baked"


def _mark_each_up_to_date(plan: BatchPlan, force: bool) -> None:
    failed_before = {} if force else _previous_user_failures(plan.out)
    for job in plan.jobs:
        if job.status != "bake":
            continue
        asset = job.asset
        try:
            asset.input_sha256, asset.inputs_sha256 = input_digests(asset.source)
            if asset.transfer:
                asset.inputs_sha256 = _transfer_digest(plan.src, asset.inputs_sha256, asset.transfer)
        except ThickbakeError as exc:
            job.fail(exc.one_line(), "user")
            continue
        except OSError as exc:
            job.fail(f"{asset.source}: cannot read the file ({exc.strerror or exc}); check its permissions", "user")
            continue
        if force:
            job.reason = "--force"
            continue
        reason = _outdated_reason(job, plan.out)
        before = failed_before.get(asset.rel)
        if reason is None:
            job.status = "skipped"
            job.reason = "up to date"
        elif (before and before.get("inputs_sha256") == asset.inputs_sha256
              and before.get("requested_settings_hash") == asset.requested_hash):
            job.fail(before.get("error") or "failed in the previous run", "user")
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
    """None when the outputs on disk are up to date (``job.result.maps`` is then set), else why not.

    The maps of an asset are found through their sidecars (``<stem>.*.json`` in the map's folder
    whose ``batch.source`` is this asset); each lists every map of its asset under ``batch.maps``.
    """
    from thickbake.maps.sidecar import BatchRecord, batch_record, parse_sidecar
    from thickbake.pipeline.load import file_sha256

    asset = job.asset
    found = asset_sidecars(asset, out)
    if not found:
        return "no map yet"
    recorded = batch_record(found[0][1]) or BatchRecord(None, None, None)
    names = recorded.maps or [PurePosixPath(asset.map_rel).name]
    folder = PurePosixPath(asset.map_rel).parent
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
        if side.input_sha256 != asset.input_sha256 or batch.inputs_sha256 != asset.inputs_sha256:
            return "the mesh changed"
        if batch.requested_settings_hash != asset.requested_hash:
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
    for name, digest in (recorded.outputs or {}).items():  # delivery files (glTF copy, packed image)
        try:
            if file_sha256(out / folder / name) != digest:
                return f"{name} does not match the sidecar"
        except OSError:
            return f"{name} is missing"
    job.result.maps = maps
    return None


def asset_sidecars(asset: PlannedAsset, out: Path) -> list[tuple[Path, dict]]:
    """(path, content) of the sidecars in OUT that a batch wrote for this asset, sorted by name.

    An unreadable file with the asset's single-map sidecar name is listed with empty content (the
    asset is then out of date); other unreadable files are left out.
    """
    from thickbake.maps.sidecar import read_batch_sidecar

    folder = (out / asset.map_rel).parent
    stem = PurePosixPath(asset.rel).stem
    found = []
    try:
        candidates = sorted(folder.glob(f"{_glob_escape(stem)}.*.json"))
    except OSError:
        return []
    for side in candidates:
        if not side.is_file():  # never open a FIFO or a folder named like a sidecar
            continue
        try:
            data = read_batch_sidecar(side, asset.rel)
        except ThickbakeError:
            if side.name == PurePosixPath(asset.sidecar_rel).name:
                found.append((side, {}))
            continue
        if data is not None:
            found.append((side, data))
    return found


def _glob_escape(text: str) -> str:
    return "".join(f"[{c}]" if c in "*?[" else c for c in text)


__all__ = ["plan_batch", "find_meshes", "map_name", "input_digests", "is_inside", "asset_sidecars", "AssetJob",
           "PlannedAsset", "AssetResult", "QueueState", "BatchPlan", "MAP_TAG", "BATCH_SUFFIXES"]
