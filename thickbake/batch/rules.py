"""Batch rules file: per-asset bake settings from a TOML ``[defaults]`` table and ordered ``[[rule]]`` tables.

A rules file (``SRC/thickbake.toml`` by default) looks like this::

    [defaults]              # applies to every asset
    size = 1024
    rays = 64
    format = "png"          # map file type: "png" (16/8-bit codes, see bits) or "tif" (float32)

    [[rule]]                # rules apply in file order; a later rule overrides an earlier one
    match = "garden/**"     # glob over the asset's path relative to SRC, POSIX separators
    size = 512

    [[rule]]
    match = ["**/*_lod1.glb", "props/small/*"]   # several globs: any one may match
    rays = 16

A rule can also measure an asset in another mesh (a transfer bake, :mod:`thickbake.pipeline.transfer`)::

    [[rule]]
    match = "characters/*_low.obj"
    source = "{base}_high.obj"      # beside the asset; "{stem}" is the file name without its suffix,
                                    # "{base}" the stem without its last _part ("bust_low" -> "bust"),
                                    # "{suffix}" the suffix with its dot; a list names several sources
    search_distance = 0.02          # or: cage = "{base}_cage.obj"

Source and cage names are paths relative to the asset's folder (``../sculpts/{base}.obj`` works).  A
mesh that some asset names as its source or cage is an input, not an asset: it is not baked itself.

Delivery keys add files beside the maps (see :class:`AssetOptions`): ``write_gltf = true`` (and
``gltf_transmission``), ``pack = { r = "thickness", b = "occlusion" }`` and ``shared_reach = "NAME"``.

Every key other than ``match``, ``format``, ``source``, ``cage``, ``search_distance`` and the delivery
keys is a :class:`~thickbake.settings.BakeSettings` field
(``size``, ``rays``, ``cone``, ``lobe``, ``measure``, ``reach``, ...) or a
:class:`~thickbake.settings.RunOptions` field (``threads``, ``chunk_rays``, ``order``), validated
exactly as the API and the command line validate them.  Globs are matched against the whole relative path, case-sensitively:
``*`` and ``?`` stay inside one folder name, ``[abc]``/``[!abc]`` match one character, and a path
part that is exactly ``**`` matches any number of folders, including none (``**/leaf.obj`` matches
``leaf.obj`` and ``garden/beds/leaf.obj``; ``garden/**`` matches everything below ``garden``).

Mistakes raise :class:`~thickbake.errors.ThickbakeError` naming the file, the line when it can be
found, the table and the key, with the allowed keys or values as the fix.
"""

from __future__ import annotations

import difflib
import os
import re
import posixpath
from dataclasses import dataclass, field
from pathlib import Path

from thickbake.errors import ThickbakeError
from thickbake.settings import OPTION_KEYS, settings_from_mapping

#: Name of the rules file looked for in the source folder when ``--config`` is not given.
DEFAULT_RULES_NAME = "thickbake.toml"
#: Map file types a rules file may ask for, with the suffix each writes.
FORMATS = {"png": ".png", "tif": ".tif", "exr": ".exr"}
#: Keys of the rules file that are not bake settings.
OUTPUT_KEYS = ("format", "write_gltf", "gltf_transmission", "pack", "shared_reach")
#: Output keys that add files beside the map (the batch's delivery options, see :class:`AssetOptions`).
DELIVERY_KEYS = ("write_gltf", "gltf_transmission", "pack", "shared_reach")
#: Keys that make an asset's bake a transfer from another mesh (names relative to the asset's folder).
TRANSFER_KEYS = ("source", "cage", "search_distance")
#: Placeholders a source or cage name may use.
NAME_FIELDS = ("stem", "base", "suffix")
#: Bake settings and run options (threads, chunk_rays, order) a table may set.
SETTING_KEYS = OPTION_KEYS
TOP_LEVEL_KEYS = ("defaults", "rule")


@dataclass(frozen=True)
class Rule:
    """One ``[[rule]]`` table: globs and the options it sets.

    Attributes
    ----------
    number : int
        1-based position in the file (rules apply in this order).
    patterns : tuple of str
        Globs over relative POSIX paths; any one matching selects the asset.
    options : dict
        Bake settings and output keys, as written in the file.
    line : int or None
        Line of the ``[[rule]]`` header in the file.
    """

    number: int
    patterns: tuple[str, ...]
    options: dict
    line: int | None = None
    _regexes: tuple = ()

    def matches(self, rel_path: str) -> bool:
        return any(rx.fullmatch(rel_path) for rx in self._regexes)

    def label(self) -> str:
        shown = self.patterns[0] if len(self.patterns) == 1 else ", ".join(self.patterns)
        return f"rule #{self.number} (match {shown!r})"


@dataclass(frozen=True)
class AssetOptions:
    """What the rules decide for one asset.

    Attributes
    ----------
    settings : dict
        Bake settings as given (defaults, then each matching rule), not yet resolved against the mesh.
    format : str
        ``"png"`` or ``"tif"``.
    rules : tuple of int
        Numbers of the rules that matched, in order.
    delivery : dict
        Delivery keys that are set: ``write_gltf`` (true: also write ``<stem>.volume.glb|.gltf``, a copy
        of a glTF source with KHR_materials_volume), ``gltf_transmission`` (0–1), ``pack`` (a table
        ``{channel = measure}``: those measures in the channels of ``<stem>.packed.png``) and
        ``shared_reach`` (a group name: every asset of the group gets one thickness reach, the largest
        of their fitted reaches, so a library decodes with one factor).
    """

    settings: dict
    format: str
    rules: tuple[int, ...]
    delivery: dict = field(default_factory=dict)
    transfer: dict = field(default_factory=dict)

    def transfer_inputs(self, rel_path: str) -> dict:
        """The transfer of the asset at ``rel_path``: ``source`` (list) and ``cage`` as paths relative to
        the source folder (POSIX), and ``search_distance``; empty when the asset is measured in itself."""
        if not self.transfer.get("source"):
            return {}
        sources = self.transfer["source"]
        sources = [sources] if isinstance(sources, str) else list(sources)
        cage = self.transfer.get("cage")
        return {"source": [expand_name(p, rel_path) for p in sources],
                "cage": expand_name(cage, rel_path) if cage else None,
                "search_distance": self.transfer.get("search_distance")}


@dataclass(frozen=True)
class RulesFile:
    """A parsed and validated rules file (or the empty one when there is none)."""

    path: Path | None = None
    defaults: dict | None = None
    rules: tuple[Rule, ...] = ()
    text: str = ""

    def options_for(self, rel_path: str) -> AssetOptions:
        """Merge the defaults and every matching rule, in order, and validate the result."""
        merged = dict(self.defaults or {})
        used = []
        for rule in self.rules:
            if rule.matches(rel_path):
                merged.update(rule.options)
                used.append(rule.number)
        fmt = merged.pop("format", "png")
        transfer = {k: merged.pop(k) for k in TRANSFER_KEYS if k in merged}
        delivery = {k: merged.pop(k) for k in DELIVERY_KEYS if k in merged}
        if delivery.get("write_gltf") is False:
            delivery.pop("write_gltf")
        tables = "[defaults]" + "".join(f", rule #{n}" for n in used)
        try:
            settings, _ = settings_from_mapping(merged, where=self._where())
            _check_delivery(settings, fmt, delivery)
        except ThickbakeError as exc:
            raise ThickbakeError(f"settings for {rel_path} (from {tables}): {exc.message}",
                                 path=self.path, fix=exc.fix) from None
        if transfer and not transfer.get("source"):
            raise ThickbakeError(f"settings for {rel_path} (from {tables}): {' and '.join(sorted(transfer))} "
                                 "without a source", path=self.path, fix='add source = "{base}_high.obj" (or the name '
                                 'of the mesh to measure in)')
        if "cage" in transfer and "search_distance" in transfer:
            raise ThickbakeError(f"settings for {rel_path} (from {tables}): both cage and search_distance",
                                 path=self.path, fix="keep one: the cage sets the search distance at every point")
        return AssetOptions(settings=merged, format=fmt, rules=tuple(used), transfer=transfer, delivery=delivery)

    def unused_rules(self, rel_paths) -> list[Rule]:
        """Rules that match none of ``rel_paths`` (usually a typo in ``match``)."""
        return [r for r in self.rules if not any(r.matches(p) for p in rel_paths)]

    def _where(self) -> str:
        return str(self.path) if self.path else "batch settings"


def _check_delivery(settings, fmt: str, delivery: dict) -> None:
    """Combinations of delivery keys and settings that cannot work (each key alone was checked on load)."""
    if settings.medium and fmt == "tif":
        raise ThickbakeError("an RGB transmittance map (medium) cannot be a float TIFF", fix='use format = "png" or "exr"')
    if delivery.get("write_gltf") and (settings.measure != "thickness" or settings.invert):
        raise ThickbakeError("write_gltf needs the thickness measure, not inverted",
                             fix='leave measure = "thickness" and invert = false where write_gltf = true')
    if "gltf_transmission" in delivery and not delivery.get("write_gltf"):
        raise ThickbakeError("gltf_transmission goes with write_gltf = true", fix="add write_gltf = true")
    if "shared_reach" in delivery and (settings.measure != "thickness" or not isinstance(settings.reach, (str, type(None)))):
        raise ThickbakeError("shared_reach gives thickness maps one fitted reach",
                             fix="use it with measure = \"thickness\" and without a numeric reach")


def _check_delivery_value(key: str, value) -> str | None:
    """Why a delivery key's value is not allowed (None when it is)."""
    if key == "write_gltf":
        return None if isinstance(value, bool) else "use true or false"
    if key == "gltf_transmission":
        ok = isinstance(value, (int, float)) and not isinstance(value, bool) and 0 <= value <= 1
        return None if ok else "use a number from 0 to 1"
    if key == "shared_reach":
        return None if isinstance(value, str) and value.strip() else 'use a group name, e.g. shared_reach = "wax"'
    if key == "pack":
        from thickbake.measures import MEASURES as KNOWN

        ok = (isinstance(value, dict) and value and all(k in ("r", "g", "b", "a") for k in value)
              and all(v in KNOWN for v in value.values()))
        return None if ok else "use a table of channel = measure, e.g. pack = { r = \"thickness\", b = \"occlusion\" }"
    return None


#: A rules file is a few dozen lines; anything over this is not one.
RULES_MAX_BYTES = 1024**2


def find_rules_file(src: Path, config: str | os.PathLike | None) -> Path | None:
    """The rules file to use: ``config`` if given (must exist), else ``SRC/thickbake.toml`` if present."""
    from thickbake.inputs import check_regular_file

    if config is not None:
        path = Path(config)
        if not path.exists() and not path.is_symlink():
            raise ThickbakeError("no such rules file", path=path,
                                 fix="give the path of a TOML rules file, or leave --config out")
        check_regular_file(path, what="rules file", max_bytes=RULES_MAX_BYTES)
        return path
    path = src / DEFAULT_RULES_NAME
    if not path.exists() and not path.is_symlink():
        return None
    check_regular_file(path, what="rules file", max_bytes=RULES_MAX_BYTES)  # never a FIFO or a folder
    return path


def load_rules(path: str | os.PathLike | None) -> RulesFile:
    """Read and validate a rules file; ``None`` gives the empty rules (all defaults)."""
    if path is None:
        return RulesFile()
    from thickbake.inputs import read_regular_file

    path = Path(path)
    try:
        text = read_regular_file(path, what="rules file", max_bytes=RULES_MAX_BYTES).decode("utf-8")
    except UnicodeDecodeError:
        raise ThickbakeError("the rules file is not UTF-8 text", path=path, fix="save it as UTF-8") from None
    except OSError as exc:
        raise ThickbakeError(f"cannot read the rules file ({exc.strerror})", path=path,
                             fix="check the path and its permissions") from None
    data = _parse_toml(text, path)
    lines = _KeyLines(text)

    for key in data:
        if key not in TOP_LEVEL_KEYS:
            raise _key_error(path, lines.find(None, key), "at the top level", key,
                             "tables allowed at the top level: [defaults] and [[rule]]",
                             extra=" (bake settings go under [defaults] or a [[rule]])" if key in SETTING_KEYS else "")
    defaults = data.get("defaults", {})
    if not isinstance(defaults, dict):
        raise ThickbakeError("'defaults' must be a table", path=path,
                             fix="write it as a [defaults] header followed by key = value lines")
    _check_table(defaults, path, lines, ("defaults", 0), "[defaults]", allow_match=False)

    raw_rules = data.get("rule", [])
    if not isinstance(raw_rules, list) or not all(isinstance(r, dict) for r in raw_rules):
        raise ThickbakeError("'rule' must be an array of tables", path=path,
                             fix="start each rule with a [[rule]] header (two brackets)")
    rules = []
    for number, table in enumerate(raw_rules, start=1):
        header = lines.header(number)
        where = f"[[rule]] #{number}"
        _check_table(table, path, lines, ("rule", number), where, allow_match=True)
        if "match" not in table:
            raise ThickbakeError(f"{_at(header)}{where} has no 'match' glob", path=path,
                                 fix='add e.g. match = "garden/**" (a glob over paths relative to the source folder)')
        patterns = table["match"]
        if isinstance(patterns, str):
            patterns = [patterns]
        at = _at(lines.find(("rule", number), "match"))
        if not isinstance(patterns, list) or not patterns or not all(isinstance(p, str) and p for p in patterns):
            raise ThickbakeError(f"{at}{where}: match = {table['match']!r} is not allowed", path=path,
                                 fix='give a glob string or a list of them, e.g. match = "garden/**"')
        regexes = []
        for pattern in patterns:
            try:
                regexes.append(glob_regex(pattern))
            except ValueError as exc:
                raise ThickbakeError(f"{at}{where}: match = {pattern!r}: {exc}", path=path,
                                     fix='write globs relative to the source folder, e.g. "garden/*.obj"') from None
        options = {k: v for k, v in table.items() if k != "match"}
        rules.append(Rule(number=number, patterns=tuple(patterns), options=options, line=header,
                          _regexes=tuple(regexes)))
    return RulesFile(path=path, defaults=defaults, rules=tuple(rules), text=text)


def expand_name(pattern: str, rel_path: str) -> str:
    """A source or cage name for the asset at ``rel_path``, relative to the source folder (POSIX).

    >>> expand_name("{base}_high{suffix}", "people/bust_low.obj")
    'people/bust_high.obj'
    >>> expand_name("../sculpts/{stem}.ply", "props/cup.glb")
    'sculpts/cup.ply'
    """
    path = posixpath.basename(rel_path)
    stem, suffix = posixpath.splitext(path)
    base = stem.rsplit("_", 1)[0] if "_" in stem else stem
    name = pattern.format(stem=stem, base=base, suffix=suffix)
    return posixpath.normpath(posixpath.join(posixpath.dirname(rel_path), name))


def _check_name(value) -> str | None:
    """Why a source/cage name pattern is not allowed, or None."""
    if not isinstance(value, str) or not value:
        return "give a file name such as \"{base}_high.obj\""
    if "\\" in value or value.startswith("/") or re.match(r"^[A-Za-z]:", value):
        return "give a name relative to the asset's folder, with '/' between folders"
    try:
        value.format(**dict.fromkeys(NAME_FIELDS, "x"))
    except (KeyError, IndexError, ValueError):
        return "placeholders are {stem}, {base} and {suffix} (write {{ and }} for braces)"
    return None


def _check_transfer_value(key: str, value) -> str | None:
    """Why a transfer key's value is not allowed, or None."""
    if key == "search_distance":
        ok = not isinstance(value, bool) and isinstance(value, (int, float)) and 0 < value < float("inf")
        return None if ok else "give a positive distance in scene units"
    if key == "source" and isinstance(value, list):
        if not value:
            return "name at least one source mesh"
        return next((why for why in map(_check_name, value) if why), None)
    return _check_name(value)


def glob_regex(pattern: str) -> re.Pattern:
    """Compile a glob over relative POSIX paths (see the module docstring for its semantics).

    >>> bool(glob_regex("**/leaf.obj").fullmatch("garden/beds/leaf.obj"))
    True
    >>> bool(glob_regex("garden/*").fullmatch("garden/beds/leaf.obj"))
    False
    """
    if pattern.startswith("./"):
        pattern = pattern[2:]
    if pattern.startswith("/") or re.match(r"^[A-Za-z]:[\\/]", pattern):
        raise ValueError("globs are relative to the source folder, not absolute")
    if "\\" in pattern:
        raise ValueError("use '/' between folders")
    parts = pattern.split("/")
    out = []
    for i, part in enumerate(parts):
        last = i == len(parts) - 1
        if part == "**":
            out.append(".*" if last else "(?:[^/]+/)*")
        else:
            out.append(_segment_regex(part) + ("" if last else "/"))
    return re.compile("".join(out))


def _segment_regex(segment: str) -> str:
    """Regex for one path part: ``*`` → any run of non-``/``, ``?`` → one, ``[...]`` → a class."""
    out = []
    i = 0
    while i < len(segment):
        ch = segment[i]
        if ch == "*":
            while i + 1 < len(segment) and segment[i + 1] == "*":
                i += 1
            out.append("[^/]*")
        elif ch == "?":
            out.append("[^/]")
        elif ch == "[":
            close = segment.find("]", i + 2 if segment[i + 1:i + 2] in ("!", "^") else i + 1)
            if close < 0:
                raise ValueError("'[' without a closing ']'")
            body = segment[i + 1:close]
            negate = body[:1] in ("!", "^")
            if negate:
                body = body[1:]
            body = body.replace("\\", "\\\\")
            out.append(f"[^/{body}]" if negate else f"[{body}]")
            i = close
        else:
            out.append(re.escape(ch))
        i += 1
    return "".join(out)


# ---------------------------------------------------------------------------- validation helpers
def _parse_toml(text: str, path: Path) -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ThickbakeError(f"not valid TOML ({exc})", path=path,
                             fix="write key = value lines under [defaults] and [[rule]] headers; "
                                 "strings need quotes") from None


def _check_table(table: dict, path: Path, lines: "_KeyLines", section, where: str, allow_match: bool) -> None:
    """Unknown keys, then each value on its own, so an error names its key and line."""
    allowed = SETTING_KEYS + OUTPUT_KEYS + TRANSFER_KEYS + (("match",) if allow_match else ())
    for key in table:
        if key not in allowed:
            extra = ""
            if not allow_match and key == "match":
                extra = " (match belongs in a [[rule]] table)"
            raise _key_error(path, lines.find(section, key), f"in {where}", key,
                             f"allowed keys: {', '.join(allowed)}", extra=extra)
    for key, value in table.items():
        line = lines.find(section, key)
        if key in TRANSFER_KEYS:
            why = _check_transfer_value(key, value)
            if why:
                raise ThickbakeError(f"{_at(line)}{where}: {key} = {value!r} is not allowed", path=path, fix=why)
        elif key == "format":
            if value not in FORMATS:
                raise ThickbakeError(f"{_at(line)}{where}: format = {value!r} is not allowed", path=path,
                                     fix=f"use {' or '.join(repr(f) for f in FORMATS)}")
        elif key in DELIVERY_KEYS:
            why = _check_delivery_value(key, value)
            if why:
                raise ThickbakeError(f"{_at(line)}{where}: {key} = {value!r} is not allowed", path=path, fix=why)
        elif key in SETTING_KEYS:
            try:
                settings_from_mapping({key: value}, where=str(path))
            except ThickbakeError as exc:
                raise ThickbakeError(f"{_at(line)}{where}: {exc.message}", path=path, fix=exc.fix) from None
    try:  # combinations (e.g. a size too large for the memory cap)
        settings_from_mapping({k: v for k, v in table.items() if k in SETTING_KEYS}, where=str(path))
    except ThickbakeError as exc:
        line = lines.header(section[1]) if section[0] == "rule" else lines.find(None, "defaults")
        raise ThickbakeError(f"{_at(line)}{where}: {exc.message}", path=path, fix=exc.fix) from None


def _key_error(path, line, where: str, key: str, allowed: str, extra: str = "") -> ThickbakeError:
    known = SETTING_KEYS + OUTPUT_KEYS + TRANSFER_KEYS + ("match",) + TOP_LEVEL_KEYS
    close = difflib.get_close_matches(key.replace("-", "_"), known, n=1)
    hint = f"did you mean {close[0]!r}? " if close and close[0] != key else ""
    return ThickbakeError(f"{_at(line)}unknown key {key!r} {where}{extra}", path=path, fix=f"{hint}{allowed}")


def _at(line: int | None) -> str:
    return f"line {line}: " if line else ""


class _KeyLines:
    """Find the line of a key in TOML text, knowing which table it sits in.

    A light scan, enough for messages: it follows ``[defaults]`` and ``[[rule]]`` headers and
    ``key = value`` lines.  Keys written inside inline tables or as dotted keys are not found (the
    message then goes without a line number).
    """

    _header = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?")

    def __init__(self, text: str):
        self.keys: dict[tuple, int] = {}
        self.headers: dict[int, int] = {}
        section = None
        rule_count = 0
        for number, line in enumerate(text.splitlines(), start=1):
            head = self._header.match(line)
            if head:
                name = head.group(2).strip("\"'")
                if head.group(1) == "[[" and name == "rule":
                    rule_count += 1
                    section = ("rule", rule_count)
                    self.headers[rule_count] = number
                elif name == "defaults":
                    section = ("defaults", 0)
                    self.keys.setdefault((None, "defaults"), number)
                else:
                    section = ("other", name)
                    self.keys.setdefault((None, name), number)
                continue
            key = re.match(r"""^\s*(?:"([^"]+)"|'([^']+)'|([A-Za-z0-9_-]+))\s*=""", line)
            if key:
                name = next(g for g in key.groups() if g is not None)
                self.keys.setdefault((section, name), number)

    def find(self, section, key: str) -> int | None:
        return self.keys.get((section, key))

    def header(self, rule_number: int) -> int | None:
        return self.headers.get(rule_number)


__all__ = ["RulesFile", "Rule", "AssetOptions", "load_rules", "find_rules_file", "glob_regex", "expand_name",
           "DEFAULT_RULES_NAME", "FORMATS"]
