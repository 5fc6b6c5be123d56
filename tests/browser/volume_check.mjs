// Load glTF files with three.js GLTFLoader and report what it made of KHR_materials_volume.
// Query: ?files=a.glb,b.glb (served under /files/).  Posts one JSON object to /result:
// {files: [{file, materials: [...], meshes: [...]}], errors: [console errors and uncaught exceptions],
//  webgl: bool, rendered: bool}.
import * as THREE from 'three';
import { GLTFLoader } from 'three/addons/loaders/GLTFLoader.js';

const errors = [];
const origError = console.error.bind(console);
console.error = (...args) => { errors.push(args.map(String).join(' ')); origError(...args); };
window.addEventListener('error', (e) => errors.push(`uncaught: ${e.message}`));
window.addEventListener('unhandledrejection', (e) => errors.push(`unhandled rejection: ${e.reason}`));

// The G channel of a texture's image, read back through a 2D canvas, row 0 = top of the image.
function greenChannel(texture) {
  const image = texture.image;
  const canvas = document.createElement('canvas');
  canvas.width = image.width; canvas.height = image.height;
  const ctx = canvas.getContext('2d', { willReadFrequently: true, colorSpace: 'srgb' });
  ctx.drawImage(image, 0, 0);
  const rgba = ctx.getImageData(0, 0, image.width, image.height).data;
  const g = new Array(image.width * image.height);
  for (let i = 0; i < g.length; i++) g[i] = rgba[4 * i + 1];
  return { width: image.width, height: image.height, flipY: texture.flipY, green: g };
}

// For up to 300 triangles of a mesh with a thickness map: the object-space face normal and the G value
// the map holds at the triangle's UV centroid (glTF: UV (0, 0) is the image's upper-left corner).
function centroidSamples(mesh, map) {
  const geo = mesh.geometry;
  const uvName = map.channel === 0 ? 'uv' : `uv${map.channel}`;
  const uv = geo.attributes[uvName];
  const pos = geo.attributes.position;
  if (!uv) return { uvName, samples: [] };
  const index = geo.index ? geo.index.array : [...Array(pos.count).keys()];
  const triangles = index.length / 3;
  const step = Math.max(1, Math.floor(triangles / 300));
  const { width, height, green } = map._green;
  const samples = [];
  const a = new THREE.Vector3(), b = new THREE.Vector3(), c = new THREE.Vector3();
  for (let t = 0; t < triangles; t += step) {
    const i0 = index[3 * t], i1 = index[3 * t + 1], i2 = index[3 * t + 2];
    a.fromBufferAttribute(pos, i0); b.fromBufferAttribute(pos, i1); c.fromBufferAttribute(pos, i2);
    const n = new THREE.Vector3().subVectors(b, a).cross(new THREE.Vector3().subVectors(c, a)).normalize();
    const u = (uv.getX(i0) + uv.getX(i1) + uv.getX(i2)) / 3;
    const v = (uv.getY(i0) + uv.getY(i1) + uv.getY(i2)) / 3;
    const col = Math.min(width - 1, Math.max(0, Math.floor(u * width)));
    const row = Math.min(height - 1, Math.max(0, Math.floor(v * height)));
    samples.push([n.x, n.y, n.z, green[row * width + col]]);
  }
  return { uvName, samples };
}

async function inspect(url) {
  const gltf = await new GLTFLoader().loadAsync(url);
  const materials = new Map();
  const meshes = [];
  gltf.scene.updateMatrixWorld(true);
  gltf.scene.traverse((obj) => {
    if (!obj.isMesh) return;
    const uvNames = Object.keys(obj.geometry.attributes).filter((n) => /^uv\d?$/.test(n));
    const m = obj.material;
    const meshEntry = { name: obj.name, material: m.name, uvAttributes: uvNames,
                        scale: obj.getWorldScale(new THREE.Vector3()).toArray() };
    meshes.push(meshEntry);
    if (m.thicknessMap) {
      if (!m.thicknessMap._green) m.thicknessMap._green = greenChannel(m.thicknessMap);
      meshEntry.thicknessSamples = centroidSamples(obj, m.thicknessMap);
    }
    if (materials.has(m.uuid)) return;
    const entry = { name: m.name, type: m.type, thickness: m.thickness, transmission: m.transmission,
                    attenuationColor: m.attenuationColor ? m.attenuationColor.toArray() : null,
                    attenuationDistance: m.attenuationDistance, thicknessMap: null };
    if (m.thicknessMap) {
      entry.thicknessMap = Object.assign({ channel: m.thicknessMap.channel,
                                           colorSpace: m.thicknessMap.colorSpace }, m.thicknessMap._green);
    }
    materials.set(m.uuid, entry);
  });
  return { scene: gltf.scene, report: { materials: [...materials.values()], meshes } };
}

async function main() {
  const params = new URLSearchParams(location.search);
  const files = (params.get('files') || '').split(',').filter(Boolean);
  const out = { files: [], errors, webgl: false, rendered: false };
  let renderer = null;
  try {
    renderer = new THREE.WebGLRenderer({ antialias: false });
    renderer.setSize(64, 64);
    out.webgl = true;
  } catch (e) {
    out.webglError = String(e);
  }
  for (const file of files) {
    try {
      const { scene, report } = await inspect(`/files/${file}`);
      if (renderer) {
        // compile and draw once: a broken material (e.g. a thickness map on a missing UV set) shows
        // up as a shader or WebGL error on the console
        const camera = new THREE.PerspectiveCamera(45, 1, 0.001, 1000);
        const box = new THREE.Box3().setFromObject(scene);
        const size = box.getSize(new THREE.Vector3()).length() || 1;
        camera.position.copy(box.getCenter(new THREE.Vector3())).add(new THREE.Vector3(0, 0, size * 1.5));
        camera.lookAt(box.getCenter(new THREE.Vector3()));
        scene.add(new THREE.DirectionalLight(0xffffff, 2));
        renderer.render(scene, camera);
        const gl = renderer.getContext();
        report.glError = gl.getError();
        out.rendered = true;
      }
      out.files.push(Object.assign({ file }, report));
    } catch (e) {
      errors.push(`${file}: ${e && e.stack ? e.stack : e}`);
    }
  }
  document.getElementById('result').textContent = 'done';
  await fetch('/result', { method: 'POST', body: JSON.stringify(out) });
}

main().catch(async (e) => {
  errors.push(`main: ${e && e.stack ? e.stack : e}`);
  await fetch('/result', { method: 'POST', body: JSON.stringify({ files: [], errors }) });
});
