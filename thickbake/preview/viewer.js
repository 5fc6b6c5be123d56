// thickbake viewer: an asset lit from behind, the light passing through it as its thickness maps say.
//
// Loaded by the page that thickbake/preview/page.py writes: that page embeds three.js (vendored, see
// vendor/LICENSE), the asset's triangles and every map with its decode information, and calls
// thickbakeViewer(THREE, DATA) once three.js is imported.  Nothing is fetched from the network.
//
// The light that crosses the body (our own back-light term): it leaves the body towards the eye with
// the Henyey-Greenstein phase function (Henyey & Greenstein, "Diffuse radiation in the Galaxy",
// Astrophysical Journal 93:70-83, 1941), scaled to 1 in the light's own direction of travel:
//     mu      = dot(V, -L)                                  cosine between the eye and the light's path
//     lobe    = ((1 - g)^2 / (1 + g^2 - 2 g mu))^(3/2)      HG(mu; g) / HG(1; g), in (0, 1]
//     glow    = strength * lobe * transmission
//     colour  = albedo * light * (max(N.L, 0) + fill * max(N.V, 0) + glow)
// with L the unit vector towards the light, V towards the eye, N the surface normal, g in [0, 1) the
// forward scattering (0: the glow looks the same from every side) and `transmission` the share of the
// light the map lets through (1 where light passes, 0 where the body is thick).  thickbake maps store
// measures, so the shader turns each into that transmission through its sidecar:
//     thickness (scene units) d -> exp(-d / attenuation distance), or per colour channel
//                                  exp(-sigma_tr * mm_per_unit * d) for a measured medium;
//     transmittance               -> the value itself;  occlusion of the inverted surface -> the value.
//
// URL fragment (all optional): #still posts one rendered frame to /result (used by `--png`);
// az, el, lightaz, lightel (degrees), forward (g), strength, fill, attenuation, mode
// (lit|surface|uv), entry (index), size=W,H.
'use strict';

function thickbakeViewer(THREE, DATA) {
  const params = new URLSearchParams(location.hash.replace(/^#/, '').replace(/&?still(&|$)/, '$1'));
  const still = /(^#|&)still(&|$)/.test(location.hash);
  const num = (key, fallback) => (params.has(key) && isFinite(parseFloat(params.get(key))) ?
    parseFloat(params.get(key)) : fallback);

  // ------------------------------------------------------------------ embedded data
  const gunzip = async (b64) => {
    const bytes = Uint8Array.from(atob(b64), (c) => c.charCodeAt(0));
    const stream = new Blob([bytes]).stream().pipeThrough(new DecompressionStream('gzip'));
    return new Uint8Array(await new Response(stream).arrayBuffer());
  };
  const typed = async (blob) => {
    const bytes = await gunzip(blob.data);
    const kinds = { float32: Float32Array, uint16: Uint16Array, uint8: Uint8Array, uint32: Uint32Array };
    return new kinds[blob.dtype](bytes.buffer, bytes.byteOffset, bytes.byteLength / kinds[blob.dtype].BYTES_PER_ELEMENT);
  };

  // ------------------------------------------------------------------ the shader (our own code)
  const vertexShader = `
    in vec2 mapUv;
    out vec3 vWorldPos;
    out vec3 vWorldNormal;
    out vec2 vUv;
    void main() {
      vec4 world = modelMatrix * vec4(position, 1.0);
      vWorldPos = world.xyz;
      vWorldNormal = normalize(mat3(modelMatrix) * normal);
      vUv = mapUv;
      gl_Position = projectionMatrix * viewMatrix * world;
    }`;

  const fragmentShader = `
    precision highp float;
    in vec3 vWorldPos;
    in vec3 vWorldNormal;
    in vec2 vUv;
    layout(location = 0) out highp vec4 outColor;
    uniform sampler2D uMap;
    uniform bool uHasMap;
    uniform int uChannels;        // 1: grey map (R used for every colour), 3: RGB map
    uniform vec3 uOffset;          // sidecar decode per channel: measure = offset + scale * stored
    uniform vec3 uScale;
    uniform int uKind;             // 0 thickness (scene units), 1 a transmission already (transmittance, occlusion)
    uniform vec3 uSigma;           // per scene unit: 1 / attenuation distance, or sigma_tr * mm_per_unit per channel
    uniform vec2 uShowRange;       // measure shown black .. white in the "map on surface" view
    uniform vec3 uLightDir;        // unit vector towards the light (directional), world space
    uniform vec3 uLightColor;
    uniform vec3 uAlbedo;
    uniform float uForward;        // Henyey-Greenstein g of the light leaving the body
    uniform float uStrength;
    uniform float uFill;           // a dim light from the eye so thick parts are not pitch black
    uniform int uMode;             // 0 lit, 1 map on surface

    vec3 storedValue() {
      vec4 s = texture(uMap, vUv);
      return uChannels == 1 ? s.rrr : s.rgb;
    }

    // IEC 61966-2-1 sRGB transfer, written here so the output is exactly what the tests decode
    vec3 srgbEncode(vec3 c) {
      c = clamp(c, 0.0, 1.0);
      return mix(c * 12.92, 1.055 * pow(c, vec3(1.0 / 2.4)) - 0.055, step(vec3(0.0031308), c));
    }

    void main() {
      vec3 N = normalize(vWorldNormal);
      vec3 V = normalize(cameraPosition - vWorldPos);
      if (!gl_FrontFacing) N = -N;
      vec3 L = normalize(uLightDir);
      vec3 measure = uHasMap ? uOffset + uScale * storedValue() : vec3(0.0);
      if (uMode == 1) {
        vec3 shown = uHasMap ? (measure - uShowRange.x) / max(uShowRange.y - uShowRange.x, 1e-30) : vec3(0.25, 0.0, 0.25);
        outColor = vec4(srgbEncode(shown), 1.0);
        return;
      }
      // the share of the back light the body lets through here
      vec3 transmission;
      if (!uHasMap) transmission = vec3(0.0);
      else if (uKind == 0) transmission = exp(-uSigma * max(measure, 0.0));
      else transmission = clamp(measure, 0.0, 1.0);
      // Henyey-Greenstein lobe about the light's direction of travel (-L), 1 at its peak
      float mu = dot(V, -L);
      float g = uForward;
      float lobe = pow((1.0 - g) * (1.0 - g) / max(1.0 + g * g - 2.0 * g * mu, 1e-12), 1.5);
      vec3 glow = uStrength * lobe * transmission;
      vec3 front = vec3(max(dot(N, L), 0.0) + uFill * max(dot(N, V), 0.0));
      vec3 colour = uAlbedo * uLightColor * (front + glow);
      outColor = vec4(srgbEncode(colour), 1.0);
    }`;

  const uvFragmentShader = `
    precision highp float;
    in vec2 vUv;
    layout(location = 0) out highp vec4 outColor;
    uniform sampler2D uMap;
    uniform int uChannels;
    uniform vec3 uOffset;
    uniform vec3 uScale;
    uniform vec2 uShowRange;
    void main() {
      vec4 s = texture(uMap, vUv);
      vec3 measure = uOffset + uScale * (uChannels == 1 ? s.rrr : s.rgb);
      vec3 shown = clamp((measure - uShowRange.x) / max(uShowRange.y - uShowRange.x, 1e-30), 0.0, 1.0);
      outColor = vec4(mix(shown * 12.92, 1.055 * pow(shown, vec3(1.0 / 2.4)) - 0.055, step(vec3(0.0031308), shown)), 1.0);
    }`;
  const uvVertexShader = `
    in vec2 mapUv;
    out vec2 vUv;
    void main() { vUv = mapUv; gl_Position = projectionMatrix * modelViewMatrix * vec4(position, 1.0); }`;

  // ------------------------------------------------------------------ state and controls
  const defaults = DATA.defaults;
  const state = {
    forward: Math.max(0, Math.min(0.95, num('forward', defaults.forward))),
    strength: num('strength', defaults.strength),
    fill: num('fill', defaults.fill),
    attenuation: num('attenuation', defaults.attenuation),
    az: num('az', defaults.az), el: num('el', defaults.el),
    lightaz: null, lightel: null,
    mode: params.get('mode') || 'lit',
    entry: Math.max(0, Math.min(DATA.entries.length - 1, Math.round(num('entry', 0)))),
    distance: 1.0,
  };
  const size = (params.get('size') || '').split(',').map(Number);

  async function build() {
    const renderer = new THREE.WebGLRenderer({ antialias: !still, preserveDrawingBuffer: still });
    renderer.outputColorSpace = THREE.LinearSRGBColorSpace; // our shader writes sRGB itself
    renderer.setPixelRatio(still ? 1 : (window.devicePixelRatio || 1));
    const host = document.getElementById('view');
    host.appendChild(renderer.domElement);
    const width = () => (size.length === 2 && size[0] > 0 ? size[0] : host.clientWidth || 800);
    const height = () => (size.length === 2 && size[1] > 0 ? size[1] : host.clientHeight || 600);

    const scene = new THREE.Scene();
    scene.background = new THREE.Color(DATA.background);
    const lo = new THREE.Vector3(...DATA.asset.bounds[0]);
    const hi = new THREE.Vector3(...DATA.asset.bounds[1]);
    const centre = lo.clone().add(hi).multiplyScalar(0.5);
    const radius = Math.max(hi.clone().sub(lo).length() / 2, 1e-12);
    const camera = new THREE.PerspectiveCamera(DATA.fov_deg, width() / height(), radius / 100, radius * 100);

    const positions = await typed(DATA.geometry.positions);
    const normals = await typed(DATA.geometry.normals);
    const uvSets = [];
    for (const blob of DATA.geometry.uv_sets) uvSets.push(await typed(blob));
    const covered = new Uint8Array(positions.length / 9);

    const materials = [];
    const entryMeshes = [];
    const textures = [];
    for (const [i, entry] of DATA.entries.entries()) {
      const faces = await typed(entry.faces);
      const stored = await typed(entry.texture);
      const { width: w, height: h, channels } = entry.texture;
      const codeMax = entry.decode.code_max || 1;
      const rgba = new Float32Array(w * h * 4);
      for (let p = 0; p < w * h; p++) {
        for (let c = 0; c < 3; c++) rgba[4 * p + c] = stored[p * channels + Math.min(c, channels - 1)] / codeMax;
        rgba[4 * p + 3] = 1;
      }
      const texture = new THREE.DataTexture(rgba, w, h, THREE.RGBAFormat, THREE.FloatType);
      // rows arrive bottom-up (row 0 = v 0), so texture coordinates are the UVs themselves
      texture.flipY = false;
      texture.magFilter = THREE.LinearFilter;
      texture.minFilter = THREE.LinearFilter;
      texture.generateMipmaps = false;
      texture.needsUpdate = true;
      textures.push(texture);
      const geometry = triangles(faces, uvSets[entry.uv_set] || uvSets[0], entry.tile_offset);
      for (const f of faces) covered[f] = 1;
      const material = termMaterial(entry, texture);
      const mesh = new THREE.Mesh(geometry, material);
      mesh.visible = !entry.hidden;
      scene.add(mesh);
      materials.push(material);
      entryMeshes.push(mesh);
    }
    const rest = [];
    for (let f = 0; f < covered.length; f++) if (!covered[f]) rest.push(f);
    if (rest.length) {
      const material = termMaterial(null, null);
      scene.add(new THREE.Mesh(triangles(rest, uvSets[0], [0, 0]), material));
      materials.push(material);
    }

    function triangles(faces, uvs, tileOffset) {
      const n = faces.length;
      const pos = new Float32Array(n * 9), nor = new Float32Array(n * 9), uv = new Float32Array(n * 6);
      for (let k = 0; k < n; k++) {
        const f = faces[k];
        pos.set(positions.subarray(9 * f, 9 * f + 9), 9 * k);
        nor.set(normals.subarray(9 * f, 9 * f + 9), 9 * k);
        for (let c = 0; c < 3; c++) {
          uv[6 * k + 2 * c] = uvs ? uvs[6 * f + 2 * c] - tileOffset[0] : 0;
          uv[6 * k + 2 * c + 1] = uvs ? uvs[6 * f + 2 * c + 1] - tileOffset[1] : 0;
        }
      }
      const g = new THREE.BufferGeometry();
      g.setAttribute('position', new THREE.BufferAttribute(pos, 3));
      g.setAttribute('normal', new THREE.BufferAttribute(nor, 3));
      g.setAttribute('mapUv', new THREE.BufferAttribute(uv, 2));
      return g;
    }

    function termMaterial(entry, texture) {
      const d = entry ? entry.decode : null;
      const three = (x) => new THREE.Vector3(...(Array.isArray(x) ? [0, 1, 2].map((c) => x[Math.min(c, x.length - 1)]) : [x, x, x]));
      return new THREE.ShaderMaterial({
        glslVersion: THREE.GLSL3,
        vertexShader, fragmentShader,
        side: THREE.DoubleSide,
        uniforms: {
          uMap: { value: texture }, uHasMap: { value: !!entry },
          uChannels: { value: entry ? entry.texture.channels : 1 },
          uOffset: { value: three(d ? d.offset : 0) }, uScale: { value: three(d ? d.scale : 1) },
          uKind: { value: d && d.kind === 'thickness' ? 0 : 1 },
          uSigma: { value: new THREE.Vector3() },
          uShowRange: { value: new THREE.Vector2(...(d ? d.show_range : [0, 1])) },
          uLightDir: { value: new THREE.Vector3(0, 0, -1) },
          uLightColor: { value: new THREE.Vector3(1, 1, 1) },
          uAlbedo: { value: new THREE.Vector3(...DATA.albedo) },
          uForward: { value: 0 }, uStrength: { value: 1 },
          uFill: { value: 0 }, uMode: { value: 0 },
        },
        userData: { entry },
      });
    }

    // UV view: the selected map over its unit square with the UV triangles on top
    const uvScene = new THREE.Scene();
    uvScene.background = new THREE.Color(DATA.background);
    const uvCamera = new THREE.OrthographicCamera(-0.05, 1.05, 1.05, -0.05, -1, 1);
    let uvObjects = [];
    function showUvEntry(i) {
      for (const o of uvObjects) uvScene.remove(o);
      uvObjects = [];
      const entry = DATA.entries[i];
      if (!entry) return;
      const d = entry.decode;
      const quad = new THREE.BufferGeometry();
      quad.setAttribute('position', new THREE.BufferAttribute(new Float32Array([0, 0, 0, 1, 0, 0, 1, 1, 0, 0, 0, 0, 1, 1, 0, 0, 1, 0]), 3));
      quad.setAttribute('mapUv', new THREE.BufferAttribute(new Float32Array([0, 0, 1, 0, 1, 1, 0, 0, 1, 1, 0, 1]), 2));
      const three = (x) => new THREE.Vector3(...[0, 1, 2].map((c) => (Array.isArray(x) ? x[Math.min(c, x.length - 1)] : x)));
      const plane = new THREE.Mesh(quad, new THREE.ShaderMaterial({
        glslVersion: THREE.GLSL3, vertexShader: uvVertexShader, fragmentShader: uvFragmentShader,
        uniforms: { uMap: { value: textures[i] }, uChannels: { value: entry.texture.channels },
          uOffset: { value: three(d.offset) }, uScale: { value: three(d.scale) },
          uShowRange: { value: new THREE.Vector2(...d.show_range) } },
      }));
      const lines = new THREE.LineSegments(uvWire(entryMeshes[i].geometry),
        new THREE.LineBasicMaterial({ color: 0x3fa7ff, transparent: true, opacity: 0.35 }));
      uvObjects = [plane, lines];
      for (const o of uvObjects) uvScene.add(o);
    }
    function uvWire(geometry) {
      const uv = geometry.getAttribute('mapUv').array;
      const n = uv.length / 6;
      const seg = new Float32Array(n * 18);
      for (let k = 0; k < n; k++) {
        for (let e = 0; e < 3; e++) {
          const a = e, b = (e + 1) % 3;
          seg.set([uv[6 * k + 2 * a], uv[6 * k + 2 * a + 1], 0.001, uv[6 * k + 2 * b], uv[6 * k + 2 * b + 1], 0.001], 18 * k + 6 * e);
        }
      }
      const g = new THREE.BufferGeometry();
      g.setAttribute('position', new THREE.BufferAttribute(seg, 3));
      return g;
    }

    // ------------------------------------------------------------------ camera and light
    const dir = (az, el) => {
      const a = THREE.MathUtils.degToRad(az), e = THREE.MathUtils.degToRad(el);
      return new THREE.Vector3(Math.sin(a) * Math.cos(e), Math.sin(e), Math.cos(a) * Math.cos(e));
    };
    // the still and the first view: the light straight behind the asset as seen from the camera
    state.lightaz = num('lightaz', state.az + 180);
    state.lightel = num('lightel', -state.el);
    state.distance = radius / Math.sin(THREE.MathUtils.degToRad(DATA.fov_deg / 2)) * 1.05;

    function update() {
      const eye = dir(state.az, state.el);
      camera.position.copy(centre).addScaledVector(eye, state.distance);
      camera.up.set(0, 1, 0);
      camera.lookAt(centre);
      camera.aspect = width() / height();
      camera.updateProjectionMatrix();
      const light = dir(state.lightaz, state.lightel);
      const attenuation = Math.max(state.attenuation, 1e-30);
      for (const m of materials) {
        const u = m.uniforms;
        const entry = m.userData.entry;
        u.uLightDir.value.copy(light);
        u.uForward.value = state.forward; u.uStrength.value = state.strength; u.uFill.value = state.fill;
        u.uMode.value = state.mode === 'surface' ? 1 : 0;
        if (entry && entry.decode.sigma_per_unit) u.uSigma.value.set(...entry.decode.sigma_per_unit);
        else u.uSigma.value.setScalar(1 / attenuation);
      }
      renderer.setSize(width(), height(), !still);
    }

    function render() {
      update();
      if (state.mode === 'uv') {
        const aspect = width() / height();
        const s = 1.1;
        uvCamera.left = 0.5 - s / 2 * Math.max(aspect, 1); uvCamera.right = 0.5 + s / 2 * Math.max(aspect, 1);
        uvCamera.bottom = 0.5 - s / 2 / Math.min(aspect, 1); uvCamera.top = 0.5 + s / 2 / Math.min(aspect, 1);
        uvCamera.updateProjectionMatrix();
        renderer.render(uvScene, uvCamera);
      } else {
        renderer.render(scene, camera);
      }
    }
    showUvEntry(state.entry);
    return { renderer, render, showUvEntry, entryMeshes };
  }

  function controls(view) {
    const panel = document.getElementById('controls');
    const sliders = [
      ['forward', 'forward scattering g', 0, 0.95, 0.01],
      ['strength', 'glow strength', 0, 4, 0.05],
      ['fill', 'front fill light', 0, 1, 0.01],
      ['lightaz', 'light azimuth (°)', -360, 360, 1],
      ['lightel', 'light elevation (°)', -89, 89, 1],
    ];
    if (DATA.entries.some((e) => e.decode.kind === 'thickness' && !e.decode.sigma_per_unit)) {
      const a = DATA.defaults.attenuation;
      sliders.push(['attenuation', `attenuation distance (${DATA.units})`, a / 20, a * 20, a / 100]);
    }
    for (const [key, label, min, max, step] of sliders) {
      const row = document.createElement('label');
      row.innerHTML = `<span>${label}</span><input type="range" min="${min}" max="${max}" step="${step}"><output></output>`;
      const input = row.querySelector('input'), out = row.querySelector('output');
      input.value = state[key];
      out.textContent = (+state[key]).toPrecision(3);
      input.addEventListener('input', () => { state[key] = parseFloat(input.value); out.textContent = (+state[key]).toPrecision(3); view.render(); });
      row.dataset.key = key;
      panel.appendChild(row);
    }
    const modes = document.getElementById('mode');
    modes.value = state.mode;
    modes.addEventListener('change', () => { state.mode = modes.value; view.render(); });
    const pick = document.getElementById('entry');
    DATA.entries.forEach((e, i) => pick.add(new Option(e.label, String(i))));
    pick.value = String(state.entry);
    pick.addEventListener('change', () => { state.entry = +pick.value; view.showUvEntry(state.entry); view.render(); });
    const list = document.getElementById('entries');
    DATA.entries.forEach((e, i) => {
      const row = document.createElement('label');
      row.innerHTML = `<input type="checkbox"> <span></span>`;
      row.querySelector('span').textContent = e.label;
      const box = row.querySelector('input');
      box.checked = view.entryMeshes[i].visible;
      box.addEventListener('change', () => { view.entryMeshes[i].visible = box.checked; view.render(); });
      list.appendChild(row);
    });
    document.getElementById('behind').addEventListener('click', () => {
      state.lightaz = state.az + 180; state.lightel = -state.el;
      for (const row of panel.querySelectorAll('label')) {
        const key = row.dataset.key;
        if (key === 'lightaz' || key === 'lightel') { row.querySelector('input').value = state[key]; row.querySelector('output').textContent = state[key].toFixed(0); }
      }
      view.render();
    });
    // drag: orbit the camera; shift-drag or right-drag: orbit the light; wheel: distance
    const canvas = view.renderer.domElement;
    let drag = null;
    canvas.addEventListener('contextmenu', (e) => e.preventDefault());
    canvas.addEventListener('pointerdown', (e) => { drag = { x: e.clientX, y: e.clientY, light: e.shiftKey || e.button === 2 }; canvas.setPointerCapture(e.pointerId); });
    canvas.addEventListener('pointerup', () => { drag = null; });
    canvas.addEventListener('pointermove', (e) => {
      if (!drag) return;
      const dx = e.clientX - drag.x, dy = e.clientY - drag.y;
      drag.x = e.clientX; drag.y = e.clientY;
      if (drag.light) { state.lightaz -= dx * 0.5; state.lightel = Math.max(-89, Math.min(89, state.lightel + dy * 0.5)); }
      else { state.az -= dx * 0.5; state.el = Math.max(-89, Math.min(89, state.el + dy * 0.5)); }
      for (const row of panel.querySelectorAll('label')) {
        const key = row.dataset.key;
        if (key === 'lightaz' || key === 'lightel') { row.querySelector('input').value = state[key]; row.querySelector('output').textContent = state[key].toFixed(0); }
      }
      view.render();
    });
    canvas.addEventListener('wheel', (e) => { e.preventDefault(); state.distance *= Math.exp(e.deltaY * 0.001); view.render(); }, { passive: false });
    window.addEventListener('resize', () => view.render());
  }

  return build().then((view) => {
    view.render();
    if (still) {
      // one frame, read back at once (the drawing buffer is preserved), posted to the local server
      const png = view.renderer.domElement.toDataURL('image/png');
      const gl = view.renderer.getContext();
      return fetch('/result', { method: 'POST', body: JSON.stringify({
        png, errors: window.thickbakeErrors || [], webgl2: gl instanceof WebGL2RenderingContext,
        width: view.renderer.domElement.width, height: view.renderer.domElement.height,
      }) });
    }
    controls(view);
    document.body.dataset.errors = JSON.stringify(window.thickbakeErrors || []);
    document.body.dataset.ready = '1';
    return null;
  });
}
