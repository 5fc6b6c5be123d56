#!/usr/bin/env python3
"""Break the package on purpose and check that the tests notice (mutation checks).

Each mutation below changes one piece of source text in a *temporary copy* of the project (the
working tree is never touched), runs the test files that guard that piece with ``PYTHONPATH``
pointing at the copy, and records whether a test failed ("killed") or everything stayed green
("SURVIVED": a test that should guard this is missing or too loose).

    python3 scripts/mutation_checks.py                 # every mutation (a few minutes on 2 cores)
    python3 scripts/mutation_checks.py bias stderr     # only mutations whose name contains a word
    python3 scripts/mutation_checks.py --list          # what each mutation does

Exit status 0 when every mutation was killed, 1 when one survived or could not be applied.

Mutations are matched by their exact source text and must match exactly once: when the code they
target is rewritten, the script stops with "not found" instead of silently testing nothing, and the
pattern here has to be updated to the new code.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
#: What a copy needs to run the tests: the package, the tests and the sample assets they read.
COPY = ("thickbake", "tests", "samples", "pyproject.toml")


@dataclass(frozen=True)
class Mutation:
    name: str
    why: str
    path: str              # file inside the project
    old: str | None        # exact text replaced (must occur once); None appends ``new`` to the file
    new: str
    tests: tuple           # test files (or node ids) that must go red
    also: tuple = ()       # further (path, old, new) edits of the same mutation


MUTATIONS = (
    Mutation("bias-correction-removed",
             "the chord is measured from the biased origin instead of the surface point",
             "thickbake/pipeline/driver.py",
             "chord = np.where(leaves, np.float32(0), distance + sample_bias[idx, None] * along)",
             "chord = np.where(leaves, np.float32(0), distance)",
             ("tests/test_bake.py",)),
    Mutation("transfer-target-normal",
             "a bake from a source solid casts its rays about the target's normal instead of the source's",
             "thickbake/pipeline/transfer.py",
             "return positions, src_normals, face, found, offset",
             "return positions, normals[found], face, found, offset",
             ("tests/test_transfer.py",)),
    Mutation("transfer-frame-ignored",
             "the source stays in its own re-centred frame instead of the target's",
             "thickbake/pipeline/transfer.py",
             "load_source(source)).in_frame(target.centre)",
             "load_source(source))",
             ("tests/test_transfer.py",)),
    Mutation("transfer-cage-one-sided",
             "a cage searches only from the cage to the target point, not as far again beyond it",
             "thickbake/pipeline/transfer.py",
             "points, directions, reach, reach)",
             "points, directions, reach, reach if self.cage is None else 0 * reach)",
             ("tests/test_transfer.py",)),
    Mutation("recentring-dropped",
             "positions are traced in world coordinates, so float32 loses a far-off solid's shape",
             "thickbake/pipeline/load.py",
             "centre = (lo + hi) / 2",
             "centre = (lo + hi) / 2 * 0",
             ("tests/test_materials.py",)),
    Mutation("offset-along-shading-normal",
             "ray origins step back along the shading normal instead of the face normal",
             "thickbake/pipeline/driver.py",
             "face_normals = np.where(flat[:, None], normals, face_normals)",
             "face_normals = normals",
             ("tests/test_materials.py",)),
    Mutation("escapes-are-misses",
             "rays that pass the reach count as escapes, so occlusion bakes of closed meshes warn",
             "thickbake/pipeline/driver.py",
             "far = max(float(s.reach), ctx.escape_distance)",
             "far = float(s.reach)",
             ("tests/test_materials.py",)),
    Mutation("materials-merged",
             "every face goes to one map whatever its material",
             "thickbake/pipeline/groups.py",
             "material = asset.face_material if asset.face_material is not None else np.zeros(len(has_uv), np.int64)",
             "material = np.zeros(len(has_uv), np.int64)",
             ("tests/test_materials.py",)),
    Mutation("blockers-own-ignored",
             "every part blocks every texel's rays whatever --blockers says",
             "thickbake/pipeline/blockers.py",
             'if choice == "all":',
             "if True:",
             ("tests/test_materials.py",)),
    Mutation("udim-shift-dropped",
             "faces in a UDIM tile keep their UVs instead of moving into the tile's square",
             "thickbake/pipeline/groups.py",
             "uv = triangle_uv - cell[:, None, :] if tiled else triangle_uv",
             "uv = triangle_uv",
             ("tests/test_materials.py",)),
    Mutation("gltf-factor-in-world-units",
             "the thicknessFactor hint ignores the node scale (world units instead of the mesh's)",
             "thickbake/maps/sidecar.py",
             '"thicknessFactor": float(reach) / scale if scale else None,',
             '"thicknessFactor": float(reach),',
             ("tests/test_materials.py",)),
    Mutation("stderr-halved",
             "every per-sample standard error is reported at half its size",
             "thickbake/pipeline/measures.py",
             "return np.sqrt(np.square(dev).sum(axis=1) / (r - 1) / r)",
             "return 0.5 * np.sqrt(np.square(dev).sum(axis=1) / (r - 1) / r)",
             ("tests/test_bake.py", "tests/test_error_bars.py")),
    Mutation("decode-wrong-code-max",
             "codes are decoded with 2^bits instead of 2^bits - 1 as full scale",
             "thickbake/maps/encode.py",
             "return offset + scale * (np.asarray(codes, np.float64) / ((1 << bits) - 1))",
             "return offset + scale * (np.asarray(codes, np.float64) / (1 << bits))",
             ("tests/test_stages.py", "tests/test_compare.py")),
    Mutation("decode-offset-dropped",
             "the sidecar's offset is ignored, so inverted maps decode wrong",
             "thickbake/maps/encode.py",
             "return offset + scale * (np.asarray(codes, np.float64) / ((1 << bits) - 1))",
             "return scale * (np.asarray(codes, np.float64) / ((1 << bits) - 1))",
             ("tests/test_stages.py", "tests/test_compare.py")),
    Mutation("cosine-pdf-wrong",
             "the cosine lobe's density is off by a factor 2 (no longer integrates to one)",
             "thickbake/lobes.py",
             "return cos_t / (math.pi * math.sin(alpha) ** 2)",
             "return cos_t / (2 * math.pi * math.sin(alpha) ** 2)",
             ("tests/test_directions.py",)),
    Mutation("padding-off-by-one",
             "the padding band stops one texel-centre distance short",
             "thickbake/maps/padding.py",
             "(~covered) & (distance <= float(pad))",
             "(~covered) & (distance < float(pad))",
             ("tests/test_stages.py", "tests/test_bake.py")),
    Mutation("uv-v-flipped",
             "row 0 of the image becomes v = 0 instead of v = 1",
             "thickbake/pipeline/texels.py",
             "px[..., 1] = (1.0 - triangle_uv[..., 1]) * height",
             "px[..., 1] = triangle_uv[..., 1] * height",
             ("tests/test_stages.py", "tests/test_bake.py")),
    Mutation("gltf-copy-factor-in-world-units",
             "the glTF copy's thicknessFactor ignores the node scale (world instead of the mesh's units)",
             "thickbake/maps/gltf_volume.py",
             "return float(reach) / self.scales[material]",
             "return float(reach)",
             ("tests/test_gltf_volume.py",)),
    Mutation("gltf-map-flipped",
             "the image embedded in the glTF copy is upside down against glTF's upper-left UV origin",
             "thickbake/pipeline/deliver.py",
             "png=encode_png(result.codes(), linear=False)",
             "png=encode_png(result.codes()[::-1], linear=False)",
             ("tests/test_gltf_volume.py",)),
    Mutation("packing-clears-other-channels",
             "packing a channel starts from a blank image instead of the existing one",
             "thickbake/maps/packing.py",
             "samples, existed = (None, False) if fresh else load_target(path, bits)",
             "samples, existed = (None, False)",
             ("tests/test_delivery.py",)),
    Mutation("medium-sigma-tr-without-3",
             "the transport coefficient drops the factor 3 of diffusion theory",
             "thickbake/media.py",
             "return np.sqrt(3.0 * sa * (sa + ss))",
             "return np.sqrt(sa * (sa + ss))",
             ("tests/test_delivery.py",)),
    Mutation("layers-upward-import",
             "a map-format module imports the command line, inside a function",
             "thickbake/maps/encode.py", None,
             "\n\ndef _mutant():\n    from thickbake.cli.output import echo\n    return echo\n",
             ("tests/test_layers.py",)),
    Mutation("layers-print-in-library",
             "a pipeline module prints",
             "thickbake/pipeline/measures.py", None,
             "\n\ndef _mutant():\n    print('library output')\n",
             ("tests/test_layers.py",)),
    Mutation("layers-cycle",
             "two modules of one sub-package import each other (allowed direction, but a cycle)",
             "thickbake/maps/padding.py", None,
             "\n\ndef _mutant():\n    from thickbake.maps import files\n    return files\n",
             ("tests/test_layers.py",),
             also=(("thickbake/maps/files.py", None,
                    "\n\ndef _mutant():\n    from thickbake.maps import padding\n    return padding\n"),)),
    Mutation("preview-ignores-sidecar-decode",
             "the viewer's shader reads the stored value as the thickness, without the sidecar's offset and scale",
             "thickbake/preview/viewer.js",
             "vec3 measure = uHasMap ? uOffset + uScale * storedValue() : vec3(0.0);",
             "vec3 measure = uHasMap ? storedValue() : vec3(0.0);",
             ("tests/test_preview.py::test_the_shader_trusts_the_sidecar_an_inverted_claim_flips_the_order",)),
    Mutation("preview-lobe-direction-sign",
             "the Henyey-Greenstein lobe is centred on the light's direction (dot(V, L)) instead of its path",
             "thickbake/preview/viewer.js",
             "float mu = dot(V, -L);",
             "float mu = dot(V, L);",
             ("tests/test_preview.py::test_forward_scattering_and_strength_act_as_henyey_greenstein",)),
)


class PatternNotFound(RuntimeError):
    pass


def make_copy(dest: Path) -> None:
    for name in COPY:
        src = ROOT / name
        if src.is_dir():
            shutil.copytree(src, dest / name, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        elif src.exists():
            shutil.copy2(src, dest / name)


def apply(mutation: Mutation, copy: Path) -> None:
    for path, old, new in ((mutation.path, mutation.old, mutation.new), *mutation.also):
        target = copy / path
        if not target.is_file():
            raise PatternNotFound(f"{path} does not exist any more: update mutation '{mutation.name}'")
        text = target.read_text(encoding="utf-8")
        if old is None:
            text += new
        else:
            count = text.count(old)
            if count != 1:
                raise PatternNotFound(f"mutation '{mutation.name}': the text {old!r} occurs {count} times in {path} "
                                      f"(expected once): the code changed, update the pattern in {Path(__file__).name}")
            text = text.replace(old, new)
        target.write_text(text, encoding="utf-8")


def run_tests(copy: Path, tests, verbose: bool) -> tuple[int, str]:
    env = dict(os.environ, PYTHONPATH=str(copy), PYTHONDONTWRITEBYTECODE="1")
    cmd = [sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider", *tests]
    proc = subprocess.run(cmd, cwd=copy, env=env, capture_output=True, text=True)
    if verbose:
        print(proc.stdout[-3000:], proc.stderr[-2000:], sep="\n")
    lines = [line for line in proc.stdout.splitlines() if line.startswith("FAILED") or line.startswith("ERROR")]
    return proc.returncode, (lines[0] if lines else proc.stdout.strip().splitlines()[-1] if proc.stdout.strip() else "")


def imported_from(copy: Path) -> str:
    env = dict(os.environ, PYTHONPATH=str(copy))
    return subprocess.run([sys.executable, "-c", "import thickbake; print(thickbake.__file__)"], cwd=copy, env=env,
                          capture_output=True, text=True).stdout.strip()


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("only", nargs="*", help="run only mutations whose name contains one of these words")
    parser.add_argument("--list", action="store_true", help="list the mutations and exit")
    parser.add_argument("--no-baseline", action="store_true",
                        help="skip the unmutated run of the same tests (it proves they pass before mutating)")
    parser.add_argument("--verbose", action="store_true", help="show pytest's output for every run")
    args = parser.parse_args(argv)

    chosen = [m for m in MUTATIONS if not args.only or any(word in m.name for word in args.only)]
    if args.list:
        for m in chosen:
            print(f"{m.name:<26} {m.path:<34} {m.why}  [{' '.join(m.tests)}]")
        return 0
    if not chosen:
        print(f"no mutation matches {args.only}", file=sys.stderr)
        return 2

    results = []
    with tempfile.TemporaryDirectory(prefix="thickbake-mutants-") as tmp:
        if not args.no_baseline:
            base = Path(tmp) / "baseline"
            make_copy(base)
            where = imported_from(base)
            if not where.startswith(str(base)):
                print(f"the copy is not the package imported (got {where!r}); is thickbake on sys.path some other way?",
                      file=sys.stderr)
                return 1
            tests = sorted({t for m in chosen for t in m.tests})
            code, last = run_tests(base, tests, args.verbose)
            if code != 0:
                print(f"the unmutated copy already fails ({last}); fix that first", file=sys.stderr)
                return 1
            print(f"baseline: {' '.join(tests)} pass on the unmutated copy")
        for m in chosen:
            copy = Path(tmp) / m.name
            make_copy(copy)
            start = time.perf_counter()
            try:
                apply(m, copy)
            except PatternNotFound as exc:
                results.append((m, "NOT APPLIED", str(exc), 0.0))
                continue
            code, last = run_tests(copy, m.tests, args.verbose)
            # pytest exits 1 when a test failed, 2 when collecting (importing) a test file failed
            status = {0: "SURVIVED", 1: "killed", 2: "killed"}.get(code, f"ERROR (pytest exit {code})")
            results.append((m, status, last, time.perf_counter() - start))
            shutil.rmtree(copy, ignore_errors=True)

    width = max(len(m.name) for m, *_ in results)
    print(f"\n{'mutation':<{width}}  {'result':<11} {'seconds':>7}  first failing test / reason")
    for m, status, last, seconds in results:
        print(f"{m.name:<{width}}  {status:<11} {seconds:7.1f}  {last}")
    bad = [m.name for m, status, *_ in results if not status.startswith("killed")]
    print(f"\n{len(results) - len(bad)} of {len(results)} mutations killed" + (f"; not killed: {', '.join(bad)}" if bad else ""))
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
