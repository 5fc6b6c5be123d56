"""The back-lit preview in a real browser: headless Chromium renders the page, the tests read its pixels.

The body: two solid spheres side by side (radii R_THIN and R_THICK, UVs in the left and right half of
one map), baked by thickbake with the cosine lobe.  At every surface point of a sphere the
cosine-weighted mean inward chord is 4R/3 (the chord at angle θ from the inward normal is 2R·cosθ and
E[cosθ] = 2/3 under the cosine lobe; REFERENCES.md, "Sphere, one surface point"), so each sphere's map
holds one value, d = 4R/3.

The still is taken with the camera on +z and the light straight behind (L = −z, towards the light),
with the back-light lobe flat (g = 0), strength 1 and no fill light.  The page's shader (viewer.js:
the Henyey–Greenstein lobe, Henyey & Greenstein, ApJ 93:70, 1941, is 1 for every direction at g = 0)
is then

    colour = albedo · (max(N·L, 0) + 1 · exp(−d / A))

Every visible point faces the camera, so N·L ≤ 0 and the front term vanishes.  So the ratio of the
linear brightness of the two discs is exp((d_thick − d_thin) / A), whatever the albedo, and their
difference is albedo · (exp(−d_thin/A) − exp(−d_thick/A)).

Tolerances, derived:
* 8-bit sRGB output: rounding to a code moves a value by at most half a code, 0.5/255 · d(linear)/d(sRGB)
  = 0.5/255 · 2.4/1.055 · linear^(1.4/2.4) in linear terms (IEC 61966-2-1 derivative), so by
  0.5/255 · 2.4/1.055 · linear^(−5/12) relative (:func:`srgb_rounding`: 1.6 % at linear 0.05, 1.1 % at
  0.11, 0.6 % at 0.47); the median of hundreds of pixels only removes noise, not this bias, so it is
  counted once per disc or patch, at its own level.
* The bake's Monte-Carlo error: the per-ray chord has relative standard deviation √(2 − 16/9)/(4/3)
  = 0.354 under the cosine lobe (REFERENCES: E[ℓ²] = 2R²); a texel averages RAYS rays, and a disc's
  median pools hundreds of texels, so the median's error is below 3 · 1.25 · 0.354 / √(RAYS · 100)
  relative in d (1.25: the median's efficiency against the mean for a normal law; 3σ).  In the
  ratio, an error δd in d moves exp(−d/A) by δd/A.
* Facets: the sphere's facet error 2R(1 − cos(π/segments)) changes d by at most that.
* Map quantisation: 16-bit codes, reach/65535 in d.
"""

from __future__ import annotations

import io
import json
import math
import os
import shutil

import numpy as np
import pytest

R_THIN = 0.08
R_THICK = 0.24
X_OFFSET = 0.4
REACH = 0.6           # ≥ the longest chord 2·R_THICK = 0.48, so no ray is clipped
ATTENUATION = 0.15    # scene units; exp(−d/A) = 0.49 (thin) and 0.12 (thick): both well above black
RAYS = 32
SEGMENTS = 48
SIZE = 96
TERM = "forward=0&strength=1&fill=0&az=0&el=0"


def _chromium_or_skip():
    from thickbake.preview.still import CHROMIUM_NAMES

    if os.environ.get("THICKBAKE_CHROMIUM") or any(shutil.which(n) for n in CHROMIUM_NAMES):
        return
    if os.environ.get("CI"):
        pytest.fail("Chromium is missing (CI installs it in .ci/run)")
    pytest.skip("Chromium is not installed (apt-get install chromium)")


def two_spheres(path):
    """Write the two-sphere OBJ: the thin sphere at x = −X with UVs in the left half, the thick at +X right."""
    import trimesh

    from thickbake.checks.shapes import sphere

    vertices, faces, uvs = [], [], []
    for radius, x, u0 in ((R_THIN, -X_OFFSET, 0.0), (R_THICK, X_OFFSET, 0.5)):
        mesh = sphere(radius, segments=SEGMENTS).mesh
        faces.append(np.asarray(mesh.faces) + sum(len(v) for v in vertices))
        vertices.append(np.asarray(mesh.vertices) + [x, 0.0, 0.0])
        uv = np.asarray(mesh.visual.uv, np.float64)
        uvs.append(np.column_stack([u0 + 0.5 * uv[:, 0], uv[:, 1]]))
    mesh = trimesh.Trimesh(np.vstack(vertices), np.vstack(faces), process=False,
                           visual=trimesh.visual.TextureVisuals(uv=np.vstack(uvs)))
    mesh.export(path)
    return path


@pytest.fixture(scope="module")
def baked(tmp_path_factory):
    """(asset path, map path) of the two spheres baked by thickbake at 128×128."""
    from thickbake.pipeline.driver import bake

    folder = tmp_path_factory.mktemp("preview")
    asset = two_spheres(folder / "spheres.obj")
    result = bake(str(asset), size=(128, 128), rays=RAYS, reach=REACH, seed=1)
    out = folder / "spheres.thickness.png"
    result.write(out)
    return asset, out


def srgb_rounding(linear):
    """Largest relative error half an 8-bit sRGB code puts on a linear value (module docstring)."""
    return 0.5 / 255 * 2.4 / 1.055 * np.asarray(linear, np.float64) ** (-5 / 12)


def _linear(srgb_codes: np.ndarray) -> np.ndarray:
    """8-bit sRGB codes → linear values (IEC 61966-2-1)."""
    c = np.asarray(srgb_codes, np.float64) / 255.0
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def disc_medians(png: bytes) -> tuple[float, float, int, int]:
    """Median linear red value of the left and the right disc (eroded by 3 px), and their pixel counts."""
    from PIL import Image
    from scipy import ndimage

    rgb = np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))
    lit = rgb.max(axis=2) > 8  # background is black
    half = rgb.shape[1] // 2
    out = []
    for side in (slice(0, half), slice(half, None)):
        mask = ndimage.binary_erosion(lit[:, side], iterations=3)
        values = _linear(rgb[:, side, 0][mask])
        out.append((float(np.median(values)) if values.size else 0.0, int(mask.sum())))
    return out[0][0], out[1][0], out[0][1], out[1][1]


def render(asset, maps, **params):
    from thickbake.preview.page import ViewSettings, build_preview
    from thickbake.preview.still import render_still

    preview = build_preview(str(asset), [str(m) for m in maps],
                            ViewSettings(attenuation=ATTENUATION, background="#000000"))
    still = render_still(preview.html, 4 * SIZE, 2 * SIZE, params=TERM)
    return preview, still


def expected_ratio() -> tuple[float, float]:
    """(exp(−d_thin/A) / exp(−d_thick/A), its allowed relative error) from the formula and the error budget."""
    d_thin, d_thick = 4 * R_THIN / 3, 4 * R_THICK / 3
    ratio = math.exp((d_thick - d_thin) / ATTENUATION)
    mc = 3 * 1.25 * math.sqrt(2 - 16 / 9) / (4 / 3) / math.sqrt(RAYS * 100)          # relative in d
    facets = 2 * R_THICK * (1 - math.cos(math.pi / SEGMENTS))                         # scene units
    codes = REACH / 65535
    d_err = mc * d_thick + facets + codes                                              # each disc, scene units
    from thickbake.preview.page import ViewSettings

    albedo = ViewSettings().albedo[0]                                                  # the red channel read
    srgb = srgb_rounding(albedo * math.exp(-d_thin / ATTENUATION)) + srgb_rounding(albedo * math.exp(-d_thick / ATTENUATION))
    return ratio, 2 * d_err / ATTENUATION + float(srgb)


def test_thin_sphere_glows_more_by_the_formulas_margin(baked):
    _chromium_or_skip()
    asset, map_path = baked
    preview, still = render(asset, [map_path])
    assert still.errors == [] and still.webgl2
    thin, thick, n_thin, n_thick = disc_medians(still.png)
    assert n_thin > 100 and n_thick > 100, "a disc is missing from the still"
    ratio, rel = expected_ratio()
    assert thin > thick
    assert abs(thin / thick / ratio - 1) < rel, (thin, thick, thin / thick, ratio, rel)


def test_the_shader_trusts_the_sidecar_an_inverted_claim_flips_the_order(baked, tmp_path):
    """The same image under a sidecar that claims it is inverted decodes to reach − d: the thin sphere now
    reads as the thicker one and goes darker, by the ratio the formula gives for the swapped values."""
    _chromium_or_skip()
    asset, map_path = baked
    shutil.copy(map_path, tmp_path / map_path.name)
    side = json.loads(map_path.with_suffix(".json").read_text())
    side["inverted"] = True
    side["encoding"]["offset"], side["encoding"]["scale"] = REACH, -REACH
    (tmp_path / map_path.with_suffix(".json").name).write_text(json.dumps(side))
    _, still = render(asset, [tmp_path / map_path.name])
    assert still.errors == []
    thin, thick, _, _ = disc_medians(still.png)
    ratio, rel = expected_ratio()
    # decoded: REACH − d, so the thin disc's brightness over the thick one's is 1 / ratio
    assert thin < thick
    assert abs(thick / thin / ratio - 1) < rel, (thin, thick, thick / thin, ratio, rel)


def test_page_is_self_contained_and_draws(baked, tmp_path):
    """No URL outside the page (three.js is embedded from the vendored, hash-checked files); the still
    has a non-empty WebGL canvas and no console error in every view mode."""
    _chromium_or_skip()
    from thickbake.preview.page import VENDOR, build_preview
    from thickbake.preview.still import render_still

    hashes = {line.split()[1]: line.split()[0] for line in (VENDOR / "README.md").read_text().splitlines()
              if line.startswith("    ") and len(line.split()) == 2}
    import hashlib
    for name, digest in hashes.items():
        assert hashlib.sha256((VENDOR / name).read_bytes()).hexdigest() == digest, name
    assert "MIT License" in (VENDOR / "LICENSE").read_text()
    asset, map_path = baked
    preview = build_preview(str(asset), [str(map_path)])
    assert "http://" not in preview.html.replace("http://www.w3.org", "") and "https://" not in preview.html
    for mode in ("surface", "uv"):
        still = render_still(preview.html, 160, 120, params=f"mode={mode}")
        assert still.errors == [] and still.webgl2 and still.size == (160, 120)
        from PIL import Image
        rgb = np.asarray(Image.open(io.BytesIO(still.png)).convert("RGB")).astype(int)
        background = rgb[0, 0]
        assert (np.abs(rgb - background).max(axis=2) > 16).mean() > 0.05, mode


def test_cli_preview_writes_page_and_still(baked, tmp_path):
    _chromium_or_skip()
    import subprocess
    import sys

    asset, map_path = baked
    page, png = tmp_path / "view.html", tmp_path / "still.png"
    proc = subprocess.run([sys.executable, "-m", "thickbake", "preview", str(asset), str(map_path.with_suffix(".json")),
                           "-o", str(page), "--png", str(png), "--size", "120x90", "--json", "-"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    assert report["still"]["errors"] == [] and report["faces_covered"] == report["faces"]
    assert page.stat().st_size > 100_000 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_cli_preview_refuses_bad_input_before_writing(baked, tmp_path):
    import subprocess
    import sys

    asset, map_path = baked
    page = tmp_path / "view.html"
    for extra in (["-o", str(tmp_path / "view.txt")], ["-o", str(page), "--size", "big"],
                  [str(tmp_path / "missing.png"), "-o", str(page)]):
        args = [sys.executable, "-m", "thickbake", "preview", str(asset)] + \
            ([] if "missing" in extra[0] else [str(map_path)]) + extra
        proc = subprocess.run(args, capture_output=True, text=True, timeout=120)
        assert proc.returncode == 2 and len(proc.stderr.strip().splitlines()) == 1, proc.stderr
        assert not page.exists()


def test_batch_previews_put_stills_and_viewer_links_in_the_report(tmp_path):
    """``batch --previews``: a viewer page beside the map, the report links it and embeds a still whose
    canvas is not empty; a second run of the up-to-date folder leaves the page's bytes untouched."""
    _chromium_or_skip()
    import base64
    import re

    from PIL import Image

    from thickbake.batch.schedule import run_batch

    src = tmp_path / "src"
    src.mkdir()
    two_spheres(src / "spheres.obj")
    (src / "thickbake.toml").write_text("[defaults]\nsize = 64\nrays = 8\n")
    outcome = run_batch(src, tmp_path / "out", previews=True)
    assert outcome.exit_code == 0
    row = outcome.report["assets"][0]
    page = tmp_path / "out" / row["viewer"]
    assert page.is_file() and row["preview_seconds"] > 0
    html_text = (tmp_path / "out" / "report.html").read_text()
    assert f'href="{row["viewer"]}"' in html_text
    stills = re.findall(r'class="still"[^>]*src="data:image/png;base64,([^"]+)"', html_text)
    assert len(stills) == 1
    rgb = np.asarray(Image.open(io.BytesIO(base64.b64decode(stills[0]))).convert("RGB")).astype(int)
    assert (np.abs(rgb - rgb[0, 0]).max(axis=2) > 16).mean() > 0.01
    before = page.stat().st_mtime_ns
    again = run_batch(src, tmp_path / "out", previews=True)
    assert again.report["assets"][0]["status"] == "skipped" and page.stat().st_mtime_ns == before


def test_several_maps_per_asset_each_on_its_own_faces(tmp_path):
    """One glTF, two materials whose UVs both fill the 0–1 square, the thick sphere's islands spread over
    UDIM tiles 1001 and 1002: three maps.  Only if the page puts each map on the faces its sidecar's
    ``map_of`` names (material, UV set, tile) do the discs show the same exp((d_thick − d_thin)/A) ratio
    as the one-map body above; a map on the wrong sphere or tile would give ratio 1 or its inverse."""
    _chromium_or_skip()
    import subprocess
    import sys

    import trimesh

    from thickbake.checks.shapes import sphere

    def part(radius, name, udim):
        mesh = sphere(radius, segments=SEGMENTS).mesh
        uv = np.asarray(mesh.visual.uv, np.float64).copy()
        if udim:  # faces right of u = 0.5 move one tile right, whole islands at once (by vertex: the
            # islands are split at seams, so each vertex belongs to one island)
            uv[uv[:, 0] > 0.5, 0] += 1.0
        material = trimesh.visual.material.PBRMaterial(name=name, baseColorFactor=[200, 200, 200, 255])
        return trimesh.Trimesh(mesh.vertices, mesh.faces, vertex_normals=mesh.vertex_normals, process=False,
                               visual=trimesh.visual.TextureVisuals(uv=uv, material=material))

    scene = trimesh.Scene()
    for name, radius, x, udim in (("wax", R_THIN, -X_OFFSET, False), ("stone", R_THICK, X_OFFSET, True)):
        scene.add_geometry(part(radius, name, udim), geom_name=name, node_name=name,
                           transform=trimesh.transformations.translation_matrix((x, 0, 0)))
    asset = tmp_path / "pair.glb"
    asset.write_bytes(scene.export(file_type="glb"))
    maps = tmp_path / "maps"
    proc = subprocess.run([sys.executable, "-m", "thickbake", "bake", str(asset), "-o", f"{maps}/", "--size", "96",
                           "--rays", str(RAYS), "--reach", str(REACH), "-q"], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    sidecars = sorted(maps.glob("*.json"))
    keys = sorted((json.loads(p.read_text())["map_of"]["material"], json.loads(p.read_text())["map_of"]["tile"])
                  for p in sidecars)
    assert keys == [("stone", 1001), ("stone", 1002), ("wax", 1001)], keys
    preview, still = render(asset, sidecars)
    assert still.errors == [] and preview.faces_covered == preview.faces
    thin, thick, n_thin, n_thick = disc_medians(still.png)
    ratio, rel = expected_ratio()
    assert n_thin > 100 and n_thick > 100
    assert abs(thin / thick / ratio - 1) < rel, (thin, thick, thin / thick, ratio, rel)


def test_rgb_medium_map_glows_redder_through_the_thin_sphere(baked, tmp_path):
    """A ``--medium`` bake stores RGB transmittance T_c = exp(−σ_tr,c · mm_per_unit · d) (σ_tr of the
    Apple preset: Jensen, Marschner, Levoy & Hanrahan, SIGGRAPH 2001, read back from the sidecar, not
    restated).  The page uses it as the transmission per channel, so per channel the thin disc's
    brightness over the thick disc's is exp(σ_tr,c · mm_per_unit · (d_thick − d_thin)) — larger for
    blue than for red — with the same error budget per channel (d errors scaled by σ instead of 1/A)."""
    _chromium_or_skip()
    import subprocess
    import sys

    from PIL import Image
    from scipy import ndimage

    asset, _ = baked
    out = tmp_path / "apple.png"
    proc = subprocess.run([sys.executable, "-m", "thickbake", "bake", str(asset), "-o", str(out), "--size", "128",
                           "--rays", str(RAYS), "--reach", str(REACH), "--seed", "1", "--medium", "Apple",
                           "--scene-unit", "1cm", "-q"], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    medium = json.loads(out.with_suffix(".json").read_text())["medium"]
    sigma = np.asarray(medium["sigma_tr_per_mm"]) * medium["mm_per_unit"]  # per scene unit
    _, still = render(asset, [out])
    assert still.errors == []
    rgb = np.asarray(Image.open(io.BytesIO(still.png)).convert("RGB"))
    lit = rgb.max(axis=2) > 8
    half = rgb.shape[1] // 2
    medians = []
    for side in (slice(0, half), slice(half, None)):
        mask = ndimage.binary_erosion(lit[:, side], iterations=3)
        medians.append(np.median(_linear(rgb[:, side][mask]), axis=0))
    measured = medians[0] / medians[1]
    d_thin, d_thick = 4 * R_THIN / 3, 4 * R_THICK / 3
    expected = np.exp(sigma * (d_thick - d_thin))
    mc = 3 * 1.25 * math.sqrt(2 - 16 / 9) / (4 / 3) / math.sqrt(RAYS * 100)
    d_err = mc * d_thick + 2 * R_THICK * (1 - math.cos(math.pi / SEGMENTS)) + REACH / 65535
    # 16-bit RGB codes of T add 1/65535 each; the 8-bit sRGB output half a code per disc at its own level
    rel = 2 * d_err * sigma + srgb_rounding(medians[0]) + srgb_rounding(medians[1]) + 2 / 65535
    assert measured[2] > measured[1] > measured[0] > 1
    assert np.all(np.abs(measured / expected - 1) < rel), (measured, expected, rel)


def test_forward_scattering_and_strength_act_as_henyey_greenstein(baked):
    """At the pixel through a sphere's centre the surface faces the eye (N = V).  The light is turned
    40° about +y from straight behind (lightaz 220: its path −L leans 40° towards +x), so
    μ = dot(V, −L) = cos(40° + τ), τ the eye ray's tilt towards −x off the axis; N·L = −μ < 0 keeps the
    front term out.  Two stills differ only in the lobe: A (g 0, strength 1) gives k·1, B (g 0.5,
    strength 1.5) gives k·1.5·((1 − g)² / (1 + g² − 2gμ))^{3/2} (the Henyey–Greenstein phase function
    over its peak; Henyey & Greenstein, ApJ 93:70, 1941), with the same k = albedo · transmission.  The
    viewer stands 1.05 / sin(17.5°) = 3.5 bounding radii from the box centre (viewer.js) and the thick
    sphere's centre lies within half a radius of it (0.32 of 0.655), so τ is below atan(0.5 / 3.5) =
    8.1° < 15°, and B/A lies between its values at 55° and 40°: [0.337, 0.557]; the 3×3-pixel patch
    changes τ by about ±0.2°, inside that bound, and 8-bit sRGB adds half a code per still at its own level
    (:func:`srgb_rounding`, about 1.1 % on A and 1.6 % on B).  A sign error in μ would
    use μ = −cos(40° + τ), B/A 0.066 (τ = 0) to 0.076 (τ = 15°), and a lobe ignoring g 1.5."""
    _chromium_or_skip()
    from PIL import Image
    from scipy import ndimage

    from thickbake.preview.page import ViewSettings, build_preview
    from thickbake.preview.still import render_still

    asset, map_path = baked
    preview = build_preview(str(asset), [str(map_path)], ViewSettings(attenuation=ATTENUATION, background="#000000"))
    centre = []
    for term in ("forward=0&strength=1", "forward=0.5&strength=1.5"):
        still = render_still(preview.html, 4 * SIZE, 2 * SIZE, params=f"{term}&fill=0&az=0&el=0&lightaz=220&lightel=0")
        assert still.errors == []
        rgb = np.asarray(Image.open(io.BytesIO(still.png)).convert("RGB"))
        half = rgb.shape[1] // 2
        mask = rgb[:, half:].max(axis=2) > 8
        row, col = (int(round(x)) for x in ndimage.center_of_mass(mask))
        centre.append(_linear(rgb[row - 1:row + 2, half + col - 1:half + col + 2, 0]).mean())
    ratio = centre[1] / centre[0]

    def lobe(angle_deg, g=0.5):
        return ((1 - g) ** 2 / (1 + g * g - 2 * g * math.cos(math.radians(angle_deg)))) ** 1.5

    low, high = 1.5 * lobe(40 + 15), 1.5 * lobe(40)
    slack = float(srgb_rounding(centre[0]) + srgb_rounding(centre[1]))
    assert low * (1 - slack) < ratio < high * (1 + slack), (ratio, low, high)


def test_interactive_page_opens_from_a_file_with_its_controls(baked, tmp_path):
    """Opened as a local file (no server, no network), the page builds its canvas and every control and
    logs no error (the page records its console errors in <body data-errors>, read from Chromium's DOM dump)."""
    _chromium_or_skip()
    import html as html_lib
    import re
    import subprocess
    import tempfile

    from thickbake.preview.page import build_preview, write_preview
    from thickbake.preview.still import CHROMIUM_FLAGS, find_chromium

    asset, map_path = baked
    page = tmp_path / "view.html"
    write_preview(build_preview(str(asset), [str(map_path)]), page)
    with tempfile.TemporaryDirectory() as profile:
        proc = subprocess.run([find_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--window-size=800,600",
                               "--virtual-time-budget=20000", "--dump-dom", page.as_uri()],
                              capture_output=True, text=True, timeout=120)
    body = re.search(r"<body([^>]*)>", proc.stdout)
    assert body and 'data-ready="1"' in body.group(1), proc.stdout[:500]
    errors = re.search(r'data-errors="([^"]*)"', body.group(1))
    assert errors and json.loads(html_lib.unescape(errors.group(1))) == []
    keys = set(re.findall(r'<label data-key="([a-z]+)"', proc.stdout))
    assert {"forward", "strength", "lightaz", "lightel", "attenuation"} <= keys
    assert re.search(r'<select id="mode">.*value="lit".*value="surface".*value="uv"', proc.stdout, re.S)
    assert "<canvas" in proc.stdout
