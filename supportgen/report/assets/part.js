// supportgen part page: 3D view of the part on its supports, and the layer plot's read-out.
// Data come from the JSON blocks #scene-data and #plot-data written by supportgen/report/web.py.
import * as THREE from 'three';
import { OrbitControls } from 'three/addons/controls/OrbitControls.js';

const body = document.body;

function bytes(b64) {
  const bin = atob(b64);
  const out = new Uint8Array(bin.length);
  for (let i = 0; i < bin.length; i++) out[i] = bin.charCodeAt(i);
  return out.buffer;
}

function geometry(m) {
  if (!m || !m.faces) return null;
  const raw = bytes(m.positions);
  let pos;
  if (m.positions_type === 'uint16') {
    const q = new Uint16Array(raw);
    pos = new Float32Array(q.length);
    for (let i = 0; i < q.length; i++) pos[i] = m.lo[i % 3] + q[i] * m.step[i % 3];
  } else {
    pos = new Float32Array(raw);
  }
  const idxRaw = bytes(m.index);
  const idx = m.index_type === 'uint16' ? new Uint16Array(idxRaw) : new Uint32Array(idxRaw);
  const g = new THREE.BufferGeometry();
  g.setAttribute('position', new THREE.BufferAttribute(pos, 3));
  g.setIndex(new THREE.BufferAttribute(idx, 1));
  g.computeBoundingSphere();
  return g;
}

function protectedMask(p, nFaces) {
  if (!p || !p.count || p.faces !== nFaces) return null;
  const bits = new Uint8Array(bytes(p.bits));
  const mask = new Uint8Array(nFaces);
  for (let f = 0; f < nFaces; f++) mask[f] = (bits[f >> 3] >> (7 - (f & 7))) & 1;
  return mask;
}

function setupView() {
  const data = JSON.parse(document.getElementById('scene-data').textContent);
  const host = document.getElementById('view3d');
  const renderer = new THREE.WebGLRenderer({ antialias: true, preserveDrawingBuffer: true });
  renderer.setPixelRatio(Math.min(window.devicePixelRatio || 1, 2));
  renderer.setClearColor(0xf4f6f8, 1);
  host.appendChild(renderer.domElement);
  renderer.domElement.id = 'view3d-canvas';

  const scene = new THREE.Scene();
  const [lo, hi] = data.bounds;
  const centre = new THREE.Vector3((lo[0] + hi[0]) / 2, (lo[1] + hi[1]) / 2, (lo[2] + hi[2]) / 2);
  const radius = Math.max(0.5 * Math.hypot(hi[0] - lo[0], hi[1] - lo[1], hi[2] - lo[2]), 1);

  const camera = new THREE.PerspectiveCamera(32, 1, radius / 100, radius * 50);
  camera.up.set(0, 0, 1);                     // build coordinates: z up, away from the plate
  scene.add(camera);
  scene.add(new THREE.HemisphereLight(0xffffff, 0x606a78, 1.4));
  const key = new THREE.DirectionalLight(0xffffff, 1.8);
  key.position.set(1, 1.5, 2);                // rides with the camera: the lit side faces the viewer
  camera.add(key);
  const fill = new THREE.DirectionalLight(0xffffff, 0.5);
  fill.position.set(-2, -1, -0.5);
  camera.add(fill);

  const groups = {};
  const partGeo = geometry(data.part);
  const partMat = new THREE.MeshStandardMaterial(
    { color: data.colours.part, roughness: 0.65, metalness: 0.0, flatShading: true });
  const protMat = new THREE.MeshStandardMaterial(
    { color: data.colours.protected, roughness: 0.65, metalness: 0.0, flatShading: true });
  let protectedDrawn = 0;
  if (partGeo) {
    // Protected faces (a bit per face, numpy.packbits order): the index is reordered so they come
    // last and drawn as a second group in their own material.
    const prot = protectedMask(data.protected, data.part.faces);
    if (prot) {
      const idx = partGeo.getIndex().array;
      const out = new idx.constructor(idx.length);
      let a = 0;
      let b = idx.length;
      for (let f = 0; f < data.part.faces; f++) {
        if (prot[f]) { b -= 3; out.set(idx.subarray(3 * f, 3 * f + 3), b); protectedDrawn++; }
        else { out.set(idx.subarray(3 * f, 3 * f + 3), a); a += 3; }
      }
      partGeo.setIndex(new THREE.BufferAttribute(out, 1));
      partGeo.addGroup(0, a, 0);
      partGeo.addGroup(a, idx.length - a, 1);
      groups.part = new THREE.Mesh(partGeo, [partMat, protMat]);
    } else {
      groups.part = new THREE.Mesh(partGeo, partMat);
    }
    scene.add(groups.part);
  }
  body.dataset.protectedFaces = String(protectedDrawn);
  const supGeo = geometry(data.supports);
  if (supGeo) {
    groups.supports = new THREE.Mesh(supGeo, new THREE.MeshStandardMaterial(
      { color: data.colours.supports, roughness: 0.55, metalness: 0.0, flatShading: true }));
    scene.add(groups.supports);
  }

  const n = data.contacts.count;
  if (n > 0) {
    const pts = new Float32Array(bytes(data.contacts.points));
    const dia = new Float32Array(bytes(data.contacts.diameters));
    const rgb = new Uint8Array(bytes(data.contacts.colours));
    const inst = new THREE.InstancedMesh(new THREE.SphereGeometry(1, 14, 10),
      new THREE.MeshStandardMaterial({ color: 0xffffff, roughness: 0.4 }), n);
    const m = new THREE.Matrix4();
    const c = new THREE.Color();
    const rmin = radius * 0.011;
    for (let i = 0; i < n; i++) {
      const r = Math.max(0.6 * dia[i], rmin);
      m.makeScale(r, r, r).setPosition(pts[3 * i], pts[3 * i + 1], pts[3 * i + 2]);
      inst.setMatrixAt(i, m);
      inst.setColorAt(i, c.setRGB(rgb[3 * i] / 255, rgb[3 * i + 1] / 255, rgb[3 * i + 2] / 255, THREE.SRGBColorSpace));
    }
    inst.instanceMatrix.needsUpdate = true;
    if (inst.instanceColor) inst.instanceColor.needsUpdate = true;
    groups.contacts = inst;
    scene.add(inst);
  }

  // Failed checks: a red ring round each location and a line down to the plate.
  const failPoints = [];
  for (const f of data.failures || []) {
    const p = new THREE.Vector3(f.xyz[0], f.xyz[1], f.xyz[2]);
    failPoints.push(p);
    const ring = new THREE.Mesh(new THREE.TorusGeometry(radius * 0.05, radius * 0.007, 8, 40),
      new THREE.MeshBasicMaterial({ color: data.colours.fail, depthTest: false, transparent: true }));
    ring.position.copy(p);
    ring.renderOrder = 10;
    scene.add(ring);
    const line = new THREE.Line(new THREE.BufferGeometry().setFromPoints([new THREE.Vector3(p.x, p.y, 0), p]),
      new THREE.LineBasicMaterial({ color: data.colours.fail }));
    scene.add(line);
  }

  // Contacts moved off protected faces: a ring round each where it now sits.
  const ringR = radius * 0.022;
  if ((data.moved || []).length) {
    const g = new THREE.Group();
    for (const q of data.moved) {
      const ring = new THREE.Mesh(new THREE.TorusGeometry(ringR, ringR * 0.18, 8, 32),
        new THREE.MeshBasicMaterial({ color: data.colours.moved, depthTest: false, transparent: true }));
      ring.position.set(q[0], q[1], q[2]);
      ring.renderOrder = 9;
      g.add(ring);
    }
    groups.moved = g;
    scene.add(g);
  }
  // Places that could only be held from protected surface: a larger ring and a line down to the plate.
  const unheldPoints = [];
  for (const q of data.unholdable || []) {
    if (!q) { unheldPoints.push(null); continue; }
    const p = new THREE.Vector3(q[0], q[1], q[2]);
    unheldPoints.push(p);
    const ring = new THREE.Mesh(new THREE.TorusGeometry(radius * 0.045, radius * 0.007, 8, 40),
      new THREE.MeshBasicMaterial({ color: data.colours.protected, depthTest: false, transparent: true }));
    ring.position.copy(p);
    ring.renderOrder = 10;
    scene.add(ring);
    scene.add(new THREE.Line(new THREE.BufferGeometry().setFromPoints([new THREE.Vector3(p.x, p.y, 0), p]),
      new THREE.LineBasicMaterial({ color: data.colours.protected })));
  }

  // The build plate: a 10 mm grid under the part.
  const span = Math.max(20, Math.ceil((Math.max(hi[0] - lo[0], hi[1] - lo[1]) * 1.6) / 20) * 20);
  const grid = new THREE.GridHelper(span, span / 10, 0x8a96a3, 0xc9d0d8);
  grid.rotation.x = Math.PI / 2;
  grid.position.set(Math.round(centre.x / 10) * 10, Math.round(centre.y / 10) * 10, 0);
  scene.add(grid);

  const controls = new OrbitControls(camera, renderer.domElement);
  controls.enableDamping = false;
  controls.target.copy(centre);

  function render() { renderer.render(scene, camera); }
  controls.addEventListener('change', render);

  function look(dir, distScale = 1, target = centre) {
    const d = new THREE.Vector3(...dir).normalize();
    const dist = distScale * radius / Math.sin(THREE.MathUtils.degToRad(camera.fov / 2)) * 1.05;
    controls.target.copy(target);
    camera.position.copy(target).addScaledVector(d, dist);
    camera.lookAt(target);
    controls.update();
    render();
  }
  const views = {
    'btn-iso': [0.9, -1.3, 0.85], 'btn-below': [0.3, -0.45, -1], 'btn-side': [0, -1, 0.08], 'btn-top': [0, -0.02, 1],
  };
  // From below the base hides the contacts: see the supports through, and drop the plate grid.
  const seeThrough = document.getElementById('tog-xray');
  function xray(on) {
    seeThrough.checked = on;
    if (groups.supports) {
      const m = groups.supports.material;
      m.transparent = on; m.opacity = on ? 0.28 : 1; m.depthWrite = !on; m.needsUpdate = true;
    }
  }
  seeThrough.addEventListener('change', () => { xray(seeThrough.checked); render(); });
  function pick(id) {
    xray(id === 'btn-below');
    grid.visible = id !== 'btn-below';
    look(views[id]);
  }
  for (const id of Object.keys(views)) {
    document.getElementById(id).addEventListener('click', () => pick(id));
  }
  for (const [id, key] of [['tog-part', 'part'], ['tog-supports', 'supports'], ['tog-contacts', 'contacts']]) {
    const box = document.getElementById(id);
    if (!groups[key]) { box.disabled = true; continue; }
    box.addEventListener('change', () => { groups[key].visible = box.checked; render(); });
  }
  const protBox = document.getElementById('tog-protected');
  if (protBox && groups.part && Array.isArray(groups.part.material)) {
    protBox.addEventListener('change', () => {
      groups.part.material = [partMat, protBox.checked ? protMat : partMat];
      if (groups.moved) groups.moved.visible = protBox.checked;
      render();
    });
  }
  for (const b of document.querySelectorAll('button[data-focus-prot]')) {
    b.addEventListener('click', () => {
      const p = unheldPoints[Number(b.dataset.focusProt)];
      if (!p) return;
      host.scrollIntoView({ behavior: 'smooth', block: 'center' });
      look([0.9, -1.3, 0.85], 0.35, p);
    });
  }
  for (const b of document.querySelectorAll('button[data-focus]')) {
    b.addEventListener('click', () => {
      const p = failPoints[Number(b.dataset.focus)];
      if (!p) return;
      host.scrollIntoView({ behavior: 'smooth', block: 'center' });
      look([0.9, -1.3, 0.85], 0.35, p);
    });
  }

  function resize() {
    const w = Math.max(host.clientWidth, 1), h = Math.max(host.clientHeight, 1);
    renderer.setSize(w, h);
    camera.aspect = w / h;
    camera.updateProjectionMatrix();
    render();
  }
  new ResizeObserver(resize).observe(host);
  resize();
  // A view may be picked in the address: NAME.report.html#below (also #iso, #side, #top).
  const start = 'btn-' + (location.hash || '#iso').slice(1);
  pick(views[start] ? start : 'btn-iso');
  return renderer;
}

function setupPlot() {
  const svg = document.getElementById('layer-plot');
  const readout = document.getElementById('readout');
  const el = document.getElementById('plot-data');
  if (!svg || !el || svg.tagName.toLowerCase() !== 'svg') return;
  const d = JSON.parse(el.textContent);
  if (!d.z || !d.z.length) return;
  const left = Number(svg.dataset.left), right = Number(svg.dataset.right);
  const zlo = Number(svg.dataset.zlo), zhi = Number(svg.dataset.zhi);
  const line = document.getElementById('hover-line');
  const NS = 'http://www.w3.org/2000/svg';
  const dots = {};
  for (const g of svg.querySelectorAll('g.panel')) {
    const c = document.createElementNS(NS, 'circle');
    c.setAttribute('r', '3.5');
    c.setAttribute('class', 'hover-dot');
    c.setAttribute('visibility', 'hidden');
    g.appendChild(c);
    dots[g.dataset.key] = { c, top: Number(g.dataset.top), y0: Number(g.dataset.y0), h: Number(g.dataset.h) };
  }
  const fmt = (v, digits, unit) => (v === null || v === undefined) ? 'n/a' : `${v.toFixed(digits)} ${unit}`;
  function nearest(z) {
    let a = 0, b = d.z.length - 1;
    while (b - a > 1) { const m = (a + b) >> 1; if (d.z[m] < z) a = m; else b = m; }
    return Math.abs(d.z[a] - z) <= Math.abs(d.z[b] - z) ? a : b;
  }
  function show(evt) {
    const pt = svg.createSVGPoint();
    pt.x = evt.clientX; pt.y = evt.clientY;
    const p = pt.matrixTransform(svg.getScreenCTM().inverse());
    if (p.x < left || p.x > right) return;
    const k = nearest(zlo + (p.x - left) / (right - left) * (zhi - zlo));
    const x = left + (d.z[k] - zlo) / (zhi - zlo) * (right - left);
    line.setAttribute('x1', x); line.setAttribute('x2', x); line.setAttribute('visibility', 'visible');
    for (const [key, o] of Object.entries(dots)) {
      const v = d[key][k];
      if (v === null) { o.c.setAttribute('visibility', 'hidden'); continue; }
      o.c.setAttribute('cx', x); o.c.setAttribute('cy', o.y0 + o.h - v / o.top * o.h);
      o.c.setAttribute('visibility', 'visible');
    }
    readout.textContent = `layer ${k} at ${fmt(d.z[k], 2, 'mm')}: cured area ${fmt(d.area[k], 1, 'mm²')}, ` +
      `separation force ${fmt(d.force[k], 3, 'N')}` +
      (d.unheld && d.unheld[k] ? `, unheld by contacts ${fmt(d.unheld[k], 3, 'N')}` : '');
  }
  svg.addEventListener('mousemove', show);
  // NAME.report.html#probe: hover the middle of the plot once (lets a headless test read the read-out).
  if (location.hash === '#probe') {
    const r = svg.getBoundingClientRect();
    show({ clientX: r.left + r.width / 2, clientY: r.top + r.height / 2 });
  }
  svg.addEventListener('mouseleave', () => {
    line.setAttribute('visibility', 'hidden');
    for (const o of Object.values(dots)) o.c.setAttribute('visibility', 'hidden');
  });
}

try {
  setupPlot();
  const renderer = setupView();
  requestAnimationFrame(() => {
    const r = renderer.domElement.getBoundingClientRect();
    body.dataset.canvasRect = [r.left, r.top, r.width, r.height].map(Math.round).join(',');
    if (!(body.dataset.status || '').startsWith('error')) body.dataset.status = 'ready';
  });
} catch (err) {
  console.error('supportgen page: ' + (err && err.message ? err.message : err));
}
