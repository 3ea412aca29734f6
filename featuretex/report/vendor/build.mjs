// Rebuilds three.bundle.js from the pinned npm packages (package.json): `node featuretex/report/vendor/build.mjs`
// from the repository root, after `npm install`. Writes VERSIONS.json beside it.
import { build } from 'esbuild';
import { readFileSync, writeFileSync, copyFileSync } from 'node:fs';
import { dirname, join } from 'node:path';
import { fileURLToPath } from 'node:url';

const here = dirname(fileURLToPath(import.meta.url));
const out = process.argv[2] || here;
const version = (pkg) => JSON.parse(readFileSync(join(here, '../../../node_modules', pkg, 'package.json'))).version;
const three = version('three'), esbuild = version('esbuild');
const licence = readFileSync(join(here, '../../../node_modules/three/LICENSE'), 'utf8');

await build({
  entryPoints: [join(here, 'entry.js')],
  bundle: true, minify: true, format: 'iife', globalName: 'featuretexThree', target: 'es2020',
  legalComments: 'none', charset: 'utf8',
  // the licence travels with the code, into every page that carries it
  banner: { js: `/* three.js ${three} (npm "three"), bundled by esbuild ${esbuild} from entry.js.\n\n${licence.trim()}\n*/` },
  outfile: join(out, 'three.bundle.js'), logLevel: 'warning',
});
copyFileSync(join(here, '../../../node_modules/three/LICENSE'), join(out, 'LICENSE-three.txt'));
writeFileSync(join(out, 'VERSIONS.json'), JSON.stringify({ three, esbuild, entry: 'entry.js' }, null, 2) + '\n');
