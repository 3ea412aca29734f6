// The parts of three.js the report's 3D view uses, bundled into one classic script that defines
// the global `featuretexThree` (the page carries it inline: no module loading, no network).
export {
  AmbientLight, Box3, Color, DirectionalLight, HemisphereLight, LinearMipmapLinearFilter, Mesh,
  MeshBasicMaterial, MeshStandardMaterial, NearestFilter, NoToneMapping, PerspectiveCamera, Raycaster,
  SRGBColorSpace, Scene, Sphere, TextureLoader, Vector2, Vector3, WebGLRenderer,
} from 'three';
export { GLTFLoader } from 'three/examples/jsm/loaders/GLTFLoader.js';
export { OrbitControls } from 'three/examples/jsm/controls/OrbitControls.js';
