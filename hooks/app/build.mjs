// Builds the sodium course app into dist/: the page, its script bundled
// with esbuild (the SMART on FHIR client and Chart.js from node_modules),
// Go's wasm_exec.js and halite's computation compiled to WebAssembly
// (cmd/halite-wasm), gzipped. The Go binary embeds dist/; CI rebuilds it
// and fails if the result differs from what is committed.
import { build } from "esbuild";
import { execFileSync } from "node:child_process";
import { copyFileSync, mkdirSync, readFileSync, rmSync, writeFileSync } from "node:fs";
import { gzipSync } from "node:zlib";
import { join } from "node:path";

const dist = "dist";
rmSync(dist, { recursive: true, force: true });
mkdirSync(dist);
for (const f of ["index.html", "launch.html", "style.css"]) copyFileSync(join("src", f), join(dist, f));
const common = { bundle: true, minify: true, format: "iife", target: "es2020", legalComments: "eof", logLevel: "warning" };
await build({ ...common, entryPoints: ["src/app.js"], outfile: join(dist, "app.js") });
await build({ ...common, entryPoints: ["src/launch.js"], outfile: join(dist, "launch.js") });

const goroot = execFileSync("go", ["env", "GOROOT"]).toString().trim();
copyFileSync(join(goroot, "lib", "wasm", "wasm_exec.js"), join(dist, "wasm_exec.js"));
const wasm = join(dist, "halite.wasm");
execFileSync("go", ["build", "-trimpath", "-buildvcs=false", "-ldflags=-s -w", "-o", wasm, "../../cmd/halite-wasm"], {
  env: { ...process.env, GOOS: "js", GOARCH: "wasm", CGO_ENABLED: "0" },
  stdio: "inherit",
});
writeFileSync(wasm + ".gz", gzipSync(readFileSync(wasm), { level: 9 }));
rmSync(wasm);
