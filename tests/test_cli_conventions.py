"""Conventions every command keeps (README, "Exit codes and errors"), checked on the real entry point.

Most checks run ``python -m thickbake`` in a temporary folder and look at the exit code, stdout,
stderr and which files exist afterwards.  Where an internal error has to be provoked, a library
function is replaced in this process and ``thickbake.cli.main.main`` is called, since a bug cannot be
planted in a subprocess.  The exit codes asserted are the documented numbers, not the package's
constants, so renumbering one is caught.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import pytest

from thickbake.checks import shapes
from thickbake.cli.main import build_parser, main

COMMANDS = ("bake", "shapes", "verify", "compare", "batch", "preview")
TINY = ("--size", "16", "--rays", "4")


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "thickbake", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


def one_line_error(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in stderr, stderr
    return lines[0]


@pytest.fixture(scope="module")
def assets(tmp_path_factory):
    """A box mesh and two small maps of it (with sidecars) in a read-only-by-convention folder."""
    folder = tmp_path_factory.mktemp("conventions")
    box = folder / "box.obj"
    box.write_bytes(shapes.obj_bytes(shapes.box().mesh))
    for name, seed in (("a.png", 0), ("b.png", 1)):
        proc = run("bake", box, "-o", folder / name, *TINY, "--seed", seed, "-q")
        assert proc.returncode == 0, proc.stderr
    return folder


def args_for(command: str, assets, tmp_path) -> list:
    """The smallest real invocation of each command."""
    return {
        "bake": ["bake", assets / "box.obj", "-o", tmp_path / "m.png", *TINY],
        "shapes": ["shapes", tmp_path / "shapes"],
        "verify": ["verify", assets / "box.obj", *TINY],
        "compare": ["compare", assets / "a.png", assets / "a.png"],
        "batch": ["batch", tmp_path / "src", "-o", tmp_path / "out", "--jobs", "1"],
        "preview": ["preview", assets / "box.obj", assets / "a.png", "-o", tmp_path / "view.html"],
    }[command]


def batch_source(tmp_path, assets):
    src = tmp_path / "src"
    src.mkdir(exist_ok=True)
    shutil.copy(assets / "box.obj", src / "box.obj")
    (src / "thickbake.toml").write_text("[defaults]\nsize = 16\nrays = 4\n")


# ---------------------------------------------------------------------------- exit codes
@pytest.mark.parametrize("command", COMMANDS)
def test_unknown_option_is_exit_2_in_one_line(command, assets, tmp_path):
    batch_source(tmp_path, assets)
    proc = run(*args_for(command, assets, tmp_path), "--no-such-option", cwd=tmp_path)
    assert proc.returncode == 2
    line = one_line_error(proc.stderr)
    assert "--no-such-option" in line and "--help" in line
    assert not (tmp_path / "m.png").exists() and not (tmp_path / "shapes").exists() and not (tmp_path / "out").exists()


def test_missing_command_and_bad_values_are_exit_2():
    assert run().returncode == 2
    proc = run("bake")                                   # MESH missing
    assert proc.returncode == 2 and "MESH" in one_line_error(proc.stderr)
    proc = run("bake", "x.obj", "--rays", "many")        # not a number
    assert proc.returncode == 2 and "--rays" in one_line_error(proc.stderr)


def test_check_failure_is_exit_1(assets, tmp_path):
    # two bakes with different seeds differ by Monte-Carlo noise, far beyond a tolerance of 1e-9
    proc = run("compare", assets / "a.png", assets / "b.png", "--tolerance", "1e-9", "--json", "-")
    assert proc.returncode == 1 and json.loads(proc.stdout)["passed"] is False


def planted(monkeypatch, exc):
    """Make the library's bakes raise ``exc`` (the command line imports them when the command runs)."""
    import thickbake.pipeline.driver

    def broken(*args, **kwargs):
        raise exc

    monkeypatch.setattr(thickbake.pipeline.driver, "bake", broken)
    monkeypatch.setattr(thickbake.pipeline.driver, "bake_maps", broken)


def test_internal_error_is_exit_70_in_one_line_naming_debug(assets, tmp_path, monkeypatch, capsys):
    planted(monkeypatch, RuntimeError("planted bug"))
    code = main(["bake", str(assets / "box.obj"), "-o", str(tmp_path / "m.png"), *TINY])
    captured = capsys.readouterr()
    assert code == 70
    line = one_line_error(captured.err)
    assert "internal error" in line and "planted bug" in line and "--debug" in line
    assert captured.out == "" and list(tmp_path.iterdir()) == []
    # --debug, before or after the command, shows the real exception instead
    for argv in (["--debug", "bake", str(assets / "box.obj")], ["bake", str(assets / "box.obj"), "--debug"]):
        with pytest.raises(RuntimeError, match="planted bug"):
            main(argv + ["-o", str(tmp_path / "m.png"), *TINY])


def test_interrupt_is_exit_130(assets, tmp_path, monkeypatch, capsys):
    planted(monkeypatch, KeyboardInterrupt())
    assert main(["bake", str(assets / "box.obj"), "-o", str(tmp_path / "m.png"), *TINY]) == 130
    assert "interrupted" in capsys.readouterr().err and list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("change, field", [
    (lambda d: d["encoding"].update(code_max="abc"), "encoding.code_max"),
    (lambda d: d.update(map_of={"material": None, "uv_set": 0, "tile": "1001"}), "map_of.tile"),
])
def test_malformed_sidecar_is_the_same_bad_input_line_for_every_reader(assets, tmp_path, change, field):
    # a malformed sidecar field is the user's file, not a bug: exit 2, and compare and preview (both
    # reading through the sidecar module) print the same one line naming the sidecar and the field
    side = json.loads((assets / "a.json").read_text())
    change(side)
    shutil.copy(assets / "a.png", tmp_path / "bad.png")
    (tmp_path / "bad.json").write_text(json.dumps(side))
    lines = []
    for argv in (["compare", tmp_path / "bad.png", assets / "a.png"],
                 ["preview", assets / "box.obj", tmp_path / "bad.png", "-o", tmp_path / "view.html"]):
        proc = run(*argv)
        assert proc.returncode == 2, proc.stderr
        lines.append(one_line_error(proc.stderr))
    assert lines[0] == lines[1] and "bad.json" in lines[0] and f"sidecar's {field} is" in lines[0]
    assert not (tmp_path / "view.html").exists()


# ---------------------------------------------------------------------------- common flags
@pytest.mark.parametrize("command", COMMANDS)
def test_common_flags_parse_before_and_after_every_command(command, tmp_path):
    parser = build_parser()
    base = [str(a) for a in args_for(command, tmp_path, tmp_path)]
    for flags in (["--debug", "-q", "-v"], ["--debug", "--quiet", "--verbose"]):
        for argv in (flags + base, base + flags, base[:1] + flags + base[1:]):
            args = parser.parse_args(argv)
            assert (args.debug, args.quiet, args.verbose) == (True, True, True), argv
    args = parser.parse_args(base)
    assert (args.debug, args.quiet, args.verbose) == (False, False, False)


@pytest.mark.parametrize("command, where", [("bake", "after"), ("shapes", "before"), ("verify", "after"),
                                           ("compare", "before"), ("batch", "after")])
def test_quiet_prints_nothing_on_stdout(command, where, assets, tmp_path):
    # where the flag goes is covered for every command by the parser test above; one real run each here
    batch_source(tmp_path, assets)
    argv = [str(a) for a in args_for(command, assets, tmp_path)]
    argv = ["-q", *argv] if where == "before" else [*argv, "-q"]
    proc = run(*argv, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""


def test_quiet_dry_run_prints_nothing_on_stdout_and_keeps_warnings(assets, tmp_path):
    # -q means the same for a dry run: no result lines (not even the plan's last one); warnings still on stderr
    batch_source(tmp_path, assets)
    with open(tmp_path / "src" / "thickbake.toml", "a") as rules:
        rules.write('[[rule]]\nmatch = "nothing/*"\nrays = 8\n')
    proc = run(*args_for("batch", assets, tmp_path), "--dry-run", "-q", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""
    assert "matches no asset" in one_line_error(proc.stderr)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("where", ["before", "after"])
def test_verbose_adds_settings_and_timings_on_stderr(where, assets, tmp_path):
    argv = ["bake", assets / "box.obj", "-o", tmp_path / "m.png", *TINY]
    proc = run(*(["-v", *argv] if where == "before" else [*argv, "-v"]))
    assert proc.returncode == 0, proc.stderr
    assert "settings:" in proc.stderr and "rays=4" in proc.stderr and "timing:" in proc.stderr
    assert len(proc.stdout.strip().splitlines()) == 1      # the summary line stays the only result


# ---------------------------------------------------------------------------- --json -
def test_verify_json_dash_is_json_on_stdout_and_no_file(assets, tmp_path):
    proc = run("verify", assets / "box.obj", *TINY, "--json", "-", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(proc.stdout)                       # stdout holds the JSON and nothing else
    assert doc["mode"] == "asset" and doc["passed"] is True and doc["checks"]
    assert list(tmp_path.iterdir()) == []               # no file named '-'


def test_compare_json_dash_is_json_on_stdout_and_no_file(assets, tmp_path):
    proc = run("compare", assets / "a.png", assets / "b.png", "--max-share", "1", "--json", "-", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(proc.stdout)
    assert doc["passed"] is True and doc["texels_compared"] > 0 and doc["max_abs"] > 0
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------- default output name
@pytest.mark.parametrize("measure", ["thickness", "occlusion"])
def test_bake_without_output_writes_stem_measure_png_beside_the_input(measure, assets, tmp_path):
    work = tmp_path / "in"
    work.mkdir()
    shutil.copy(assets / "box.obj", work / "crate.obj")
    proc = run("bake", work / "crate.obj", *TINY, "--measure", measure, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert sorted(p.name for p in work.iterdir()) == sorted(["crate.obj", f"crate.{measure}.png",
                                                              f"crate.{measure}.json"])
    assert json.loads((work / f"crate.{measure}.json").read_text())["measure"] == measure
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in"]   # nothing in the working folder


# ---------------------------------------------------------------------------- help
def positional_help(help_text: str) -> dict[str, str]:
    """{metavar: its help} from the "positional arguments:" section of argparse's --help text."""
    lines = help_text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("positional arguments"))
    found, name = {}, None
    for line in lines[start + 1:]:
        if not line.strip() or not line.startswith(" "):
            break
        indent = len(line) - len(line.lstrip())
        if indent == 2:                                    # a new argument: "  MESH   help text"
            name, _, rest = line.strip().partition("  ")
            found[name] = rest.strip()
        elif name is not None:                             # help continued or started on the next line
            found[name] = (found[name] + " " + line.strip()).strip()
    return found


@pytest.mark.parametrize("command, positionals", [("bake", {"MESH"}), ("shapes", {"OUTDIR"}), ("verify", {"MESH"}),
                                                  ("compare", {"A", "B"}), ("batch", {"SRC"})])
def test_every_positional_argument_has_help(command, positionals):
    proc = run(command, "--help")
    found = positional_help(proc.stdout)
    assert set(found) == positionals, found
    assert all(len(text.split()) >= 3 for text in found.values()), found


@pytest.mark.parametrize("command", (None, *COMMANDS))
def test_help_ends_with_examples(command):
    proc = run(*([command] if command else []), "--help")
    assert proc.returncode == 0
    text = proc.stdout.rstrip()
    tail = text[text.rindex("examples:"):].splitlines()[1:]
    examples = [line for line in tail if line.strip().startswith("thickbake ")]
    assert 2 <= len(examples) <= 4, text[-600:]
    # the examples close the help: after them at most the exit-code line
    assert all(line.strip().startswith(("thickbake ", "exit codes")) or not line.strip() for line in tail), tail
    if command:
        assert any(line.strip().startswith(f"thickbake {command}") for line in examples)
