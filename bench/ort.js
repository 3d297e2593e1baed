// ONNX Runtime reference run for heedmap's side-by-side benchmark.
//
// Usage: node ort.js   (started by bench/cmd/heedbench, which writes
// requests on its stdin). It first prints {"ort_version": ...}; then each
// request line gets one reply line: {"op": "time", ...} the forward timing
// of one model and batch size, {"op": "occlusion", ...} the timing of an
// occlusion map computed with ordinary batched forward passes (the map
// itself is written as raw little-endian float32 so the Go driver can
// compare it with heedmap's).
//
// Every session uses intraOpNumThreads = the request's threads (2) and sequential
// execution, all graph optimisations on: ONNX Runtime's usual CPU setting.
'use strict';

const fs = require('fs');
const path = require('path');
const readline = require('readline');
const ort = require(path.join(__dirname, 'node', 'node_modules', 'onnxruntime-node'));

function readF32(file) {
  const b = fs.readFileSync(file);
  return new Float32Array(b.buffer, b.byteOffset, b.byteLength / 4);
}

function seconds(t0) {
  return Number(process.hrtime.bigint() - t0) / 1e9;
}

async function session(model, threads) {
  return ort.InferenceSession.create(model, {
    intraOpNumThreads: threads,
    interOpNumThreads: 1,
    executionMode: 'sequential',
    graphOptimizationLevel: 'all',
  });
}

function batchOf(img, n, shape) {
  const data = new Float32Array(n * img.length);
  for (let i = 0; i < n; i++) data.set(img, i * img.length);
  return new ort.Tensor('float32', data, [n, ...shape]);
}

// Window origins along an axis of n pixels: 0, s, 2s, ... while the patch
// fits, plus one flush with the far edge if the stride does not land there.
function origins(n, p, s) {
  if (p >= n) return [0];
  const o = [];
  for (let x = 0; x + p <= n; x += s) o.push(x);
  if (o[o.length - 1] + p < n) o.push(n - p);
  return o;
}

async function occlusion(occ, img, shape) {
  const [c, h, w] = shape;
  const sess = await session(occ.model, occ.threads);
  const input = sess.inputNames[0], output = sess.outputNames[0];
  const wins = [];
  for (const y of origins(h, occ.patch, occ.stride)) {
    for (const x of origins(w, occ.patch, occ.stride)) {
      wins.push({ x, y, w: Math.min(occ.patch, w), h: Math.min(occ.patch, h) });
    }
  }
  const size = c * h * w;
  const score = (out, i) => out.data[i * out.dims[1] + occ.class];
  // Warm-up at the batch size used below (allocations, kernel selection).
  await sess.run({ [input]: batchOf(img, occ.batch, shape) });

  const t0 = process.hrtime.bigint();
  const base = score((await sess.run({ [input]: batchOf(img, 1, shape) }))[output], 0);
  const scores = new Float64Array(wins.length);
  for (let start = 0; start < wins.length; start += occ.batch) {
    const m = Math.min(occ.batch, wins.length - start);
    const data = new Float32Array(m * size);
    for (let j = 0; j < m; j++) {
      const dst = data.subarray(j * size, (j + 1) * size);
      dst.set(img);
      const win = wins[start + j];
      for (let k = 0; k < c; k++) {
        for (let y = win.y; y < win.y + win.h; y++) {
          const row = k * h * w + y * w;
          dst.fill(0, row + win.x, row + win.x + win.w); // model-space zero
        }
      }
    }
    const out = (await sess.run({ [input]: new ort.Tensor('float32', data, [m, ...shape]) }))[output];
    for (let j = 0; j < m; j++) scores[start + j] = score(out, j);
  }
  // Map: mean over the windows covering each pixel of (base - occluded).
  const sum = new Float64Array(h * w), cnt = new Uint32Array(h * w);
  wins.forEach((win, i) => {
    const d = base - scores[i];
    for (let y = win.y; y < win.y + win.h; y++) {
      for (let x = win.x; x < win.x + win.w; x++) {
        sum[y * w + x] += d;
        cnt[y * w + x]++;
      }
    }
  });
  const map = new Float32Array(h * w);
  for (let i = 0; i < map.length; i++) map[i] = sum[i] / cnt[i];
  const secs = seconds(t0);
  fs.writeFileSync(occ.out, Buffer.from(map.buffer));
  return { model: occ.model, windows: wins.length, batch: occ.batch, seconds: secs, base };
}

// Worker mode: one JSON request per line on stdin, one JSON reply per line
// on stdout, so the driver can give each engine its turn of a configuration
// right after heedmap's (both see the machine in the same state). Sessions
// are created once per model and kept for the worker's life.
async function main() {
  const version = require(path.join(__dirname, 'node', 'node_modules', 'onnxruntime-node', 'package.json')).version;
  const sessions = new Map();
  const sessionOf = async (model, threads) => {
    if (!sessions.has(model)) sessions.set(model, await session(model, threads));
    return sessions.get(model);
  };
  const reply = (obj) => process.stdout.write(JSON.stringify(obj) + '\n');
  reply({ ort_version: version });
  const rl = readline.createInterface({ input: process.stdin, terminal: false });
  for await (const line of rl) {
    if (!line.trim()) continue;
    const req = JSON.parse(line);
    const img = readF32(req.image);
    if (req.op === 'time') {
      const sess = await sessionOf(req.model, req.threads);
      const input = sess.inputNames[0], output = sess.outputNames[0];
      const feed = { [input]: batchOf(img, req.batch, req.shape) };
      let logits;
      for (let i = 0; i < req.warmup; i++) logits = (await sess.run(feed))[output];
      // At least req.iters iterations and at least req.min_seconds.
      const t0 = process.hrtime.bigint();
      let n = 0;
      for (; n < req.iters || seconds(t0) < (req.min_seconds || 0); n++) await sess.run(feed);
      const secs = seconds(t0);
      reply({ name: req.name, batch: req.batch, iters: n, seconds: secs, logits: Array.from(logits.data.slice(0, logits.dims[1])) });
    } else if (req.op === 'occlusion') {
      reply(await occlusion(req, img, req.shape));
    } else {
      throw new Error(`unknown request ${JSON.stringify(req.op)}`);
    }
  }
}

main().catch((e) => {
  console.error('ort.js:', e && e.stack ? e.stack : e);
  process.exit(1);
});
