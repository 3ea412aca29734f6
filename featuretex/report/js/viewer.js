// The report's 3D view: the delivered model.glb (carried in the page as base64), orbit / zoom /
// reset, three surfaces to drape on it (delivered texture, classical bake, error map with its
// region numbers) and lit or unlit shading. Uses the three.js bundle the page carries
// (window.featuretexThree). Renders only when something changed.
//
// The page's address may fix the start: #camera=px,py,pz,tx,ty,tz,fov (glTF frame, vertical field
// of view in degrees) &mode=delivered|classical|errors &shade=lit|unlit &filter=nearest.
// When the first picture is on screen the view's element gets data-state="ready" (or "failed").
(() => {
  'use strict';
  const root = document.getElementById('viewer3d');
  if (!root) return;
  const T = window.featuretexThree;
  const fail = (why) => {
    root.dataset.state = 'failed';
    const box = root.querySelector('.vw-fail');
    box.textContent = 'The 3D view could not start: ' + why +
      '. Every figure and picture below is still valid; model.glb opens in any glTF viewer.';
    box.hidden = false;
  };
  if (!T) { fail('the page\'s copy of three.js did not load'); return; }

  const data = JSON.parse(document.getElementById('viewer3d-data').textContent);
  const hash = new URLSearchParams(location.hash.slice(1));
  const canvas = root.querySelector('canvas');
  const stage = root.querySelector('.vw-stage');
  const pins = root.querySelector('.vw-pins');

  let renderer;
  try {
    renderer = new T.WebGLRenderer({ canvas, antialias: true, alpha: true });
  } catch (e) {
    fail('this browser has WebGL turned off or unavailable');
    return;
  }
  renderer.outputColorSpace = T.SRGBColorSpace;
  renderer.toneMapping = T.NoToneMapping;
  renderer.setPixelRatio(window.devicePixelRatio || 1);

  const scene = new T.Scene();
  const camera = new T.PerspectiveCamera(30, 1, 0.001, 100);
  camera.up.set(0, 1, 0);
  scene.add(camera);
  const headlight = new T.DirectionalLight(0xffffff, 2.2);   // follows the camera: the side you look at is lit
  headlight.position.set(0.35, 0.6, 1.0);
  camera.add(headlight);
  camera.add(headlight.target);
  headlight.target.position.set(0, 0, -1);
  const ambient = new T.AmbientLight(0xffffff, 0.9);
  scene.add(ambient);

  const controls = new T.OrbitControls(camera, canvas);
  controls.enableDamping = false;
  controls.screenSpacePanning = true;

  const state = { mode: hash.get('mode') || 'delivered', shade: hash.get('shade') || 'lit' };
  const nearest = hash.get('filter') === 'nearest';
  const maps = {};
  let mesh = null, home = null, sphere = null, pending = false;

  function prepare(tex, crisp) {
    tex.flipY = false;                       // glTF's UV origin
    tex.colorSpace = T.SRGBColorSpace;
    if (nearest || crisp) {
      tex.magFilter = T.NearestFilter;
      if (nearest) { tex.minFilter = T.NearestFilter; tex.generateMipmaps = false; }
    }
    tex.needsUpdate = true;
    return tex;
  }

  function draw() {
    pending = false;
    if (!mesh) return;
    renderer.render(scene, camera);
    placePins();
    if (root.dataset.state !== 'ready') root.dataset.state = 'ready';
  }
  function redraw() {
    if (!pending) { pending = true; requestAnimationFrame(draw); }
  }

  function resize() {
    const w = stage.clientWidth, h = stage.clientHeight;
    if (!w || !h) return;
    renderer.setSize(w, h, false);
    camera.aspect = w / h;
    camera.updateProjectionMatrix();
    redraw();
  }

  const ray = new T.Raycaster();
  const v = new T.Vector3();
  function placePins() {
    const show = state.mode === 'errors';
    pins.hidden = !show;
    if (!show) return;
    const w = stage.clientWidth, h = stage.clientHeight;
    for (const pin of pins.children) {
      const p = pin._at;
      v.copy(p).project(camera);
      let visible = v.z > -1 && v.z < 1 && Math.abs(v.x) <= 1 && Math.abs(v.y) <= 1;
      if (visible) {                          // hidden behind another part of the model?
        const dir = p.clone().sub(camera.position);
        const dist = dir.length();
        ray.set(camera.position, dir.normalize());
        ray.far = dist;
        const hit = ray.intersectObject(mesh, false)[0];
        visible = !hit || hit.distance > dist - 0.02 * sphere.radius;
      }
      pin.hidden = !visible;
      if (visible) pin.style.transform = `translate(${(v.x + 1) / 2 * w}px, ${(1 - v.y) / 2 * h}px)`;
    }
  }

  function applySurface() {
    if (!mesh) return;
    const map = maps[state.mode] || maps.delivered;
    mesh.material = state.shade === 'lit' ? mesh.userData.lit : mesh.userData.unlit;
    mesh.material.map = map;
    mesh.material.needsUpdate = true;
    for (const b of root.querySelectorAll('button[data-mode]')) b.setAttribute('aria-pressed', String(b.dataset.mode === state.mode));
    for (const b of root.querySelectorAll('button[data-shade]')) b.setAttribute('aria-pressed', String(b.dataset.shade === state.shade));
    root.querySelector('.vw-legend').hidden = state.mode !== 'errors';
    redraw();
  }

  function frame() {
    // start: the numbers given in the address, else from the front and a little above
    const given = (hash.get('camera') || '').split(',').map(Number);
    if (given.length === 7 && given.every(Number.isFinite)) {
      camera.position.set(given[0], given[1], given[2]);
      controls.target.set(given[3], given[4], given[5]);
      camera.fov = given[6];
    } else {
      const d = sphere.radius / Math.sin((camera.fov / 2) * Math.PI / 180) * 1.08;
      const el = 12 * Math.PI / 180;
      camera.position.set(sphere.center.x, sphere.center.y + d * Math.sin(el), sphere.center.z + d * Math.cos(el));
      controls.target.copy(sphere.center);
    }
    camera.near = Math.max(sphere.radius * 0.01, 1e-4);
    camera.far = sphere.radius * 40 + camera.position.distanceTo(sphere.center);
    camera.updateProjectionMatrix();
    controls.update();
    home = { position: camera.position.clone(), target: controls.target.clone(), fov: camera.fov };
  }

  function reset() {
    camera.position.copy(home.position);
    controls.target.copy(home.target);
    camera.fov = home.fov;
    camera.updateProjectionMatrix();
    controls.update();
    redraw();
  }

  function start([gltf, ...textures]) {
    gltf.scene.updateMatrixWorld(true);
    gltf.scene.traverse((o) => { if (o.isMesh && !mesh) mesh = o; });
    if (!mesh) { fail('model.glb holds no mesh'); return; }
    scene.add(gltf.scene);
    const delivered = mesh.material.map;
    if (!delivered) { fail('model.glb carries no texture'); return; }
    maps.delivered = prepare(delivered, false);
    Object.keys(data.textures).forEach((mode, i) => { maps[mode] = prepare(textures[i], mode === 'errors'); });
    mesh.userData.unlit = new T.MeshBasicMaterial({ map: delivered });
    mesh.userData.lit = new T.MeshStandardMaterial({ map: delivered, roughness: 0.85, metalness: 0.0 });
    sphere = new T.Box3().setFromObject(gltf.scene).getBoundingSphere(new T.Sphere());
    for (const r of data.regions) {
      const pin = document.createElement('span');
      pin.className = 'vw-pin';
      pin.textContent = String(r.n);
      pin.title = r.label;
      pin._at = new T.Vector3(r.at[0], r.at[1], r.at[2]);
      pins.appendChild(pin);
    }
    frame();
    controls.addEventListener('change', redraw);
    new ResizeObserver(resize).observe(stage);
    resize();
    applySurface();
  }

  root.addEventListener('click', (e) => {
    const b = e.target.closest('button');
    if (!b) return;
    if (b.dataset.mode) state.mode = b.dataset.mode;
    if (b.dataset.shade) state.shade = b.dataset.shade;
    if (b.dataset.act === 'reset') { reset(); return; }
    applySurface();
  });

  const bin = atob(data.glb);
  const bytes = new Uint8Array(bin.length);
  for (let i = 0; i < bin.length; i++) bytes[i] = bin.charCodeAt(i);
  const loader = new T.TextureLoader();
  Promise.all([new T.GLTFLoader().parseAsync(bytes.buffer, ''),
               ...Object.values(data.textures).map((uri) => loader.loadAsync(uri))])
    .then(start)
    .catch((e) => fail('the model could not be read (' + (e && e.message || e) + ')'));
})();
