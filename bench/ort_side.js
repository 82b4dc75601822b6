// ONNX Runtime side of apportion's benchmark comparison (bench/compare): the
// forward-pass anchor. Needs node and the npm package onnxruntime-node
// (installed with `npm install --ignore-scripts onnxruntime-node@1.30.0`),
// found through NODE_PATH. Answers JSON requests, one per line on stdin,
// one JSON answer per line on stdout:
//
//   {"cmd": "info"}                                   -> versions
//   {"cmd": "time", "path": P, "shape": [..], "batch": B, "iters": K, "threads": T}
//                                                     -> seconds for K calls
//
// A call is one InferenceSession.run on a batch of B samples, each element i
// of the batch 0.5·sin(0.37·i + 0.1) (bench.Input), timed inside node over
// K calls. The session runs with T intra-op threads and one inter-op thread,
// sequential execution, all graph optimisations.
'use strict';

const readline = require('readline');
const ort = require('onnxruntime-node');

const sessions = new Map();

async function session(path, threads) {
  const key = path + '#' + threads;
  if (!sessions.has(key)) {
    sessions.set(key, await ort.InferenceSession.create(path, {
      intraOpNumThreads: threads,
      interOpNumThreads: 1,
      executionMode: 'sequential',
      graphOptimizationLevel: 'all',
    }));
  }
  return sessions.get(key);
}

function input(shape, batch) {
  const size = batch * shape.reduce((a, b) => a * b, 1);
  const x = new Float32Array(size);
  for (let i = 0; i < size; i++) {
    x[i] = 0.5 * Math.sin(0.37 * i + 0.1);
  }
  return new ort.Tensor('float32', x, [batch, ...shape]);
}

async function time(req) {
  const s = await session(req.path, req.threads || 1);
  const feeds = { [s.inputNames[0]]: input(req.shape, req.batch) };
  await s.run(feeds); // warm up
  const t0 = process.hrtime.bigint();
  for (let i = 0; i < req.iters; i++) {
    await s.run(feeds);
  }
  return { seconds: Number(process.hrtime.bigint() - t0) / 1e9 };
}

async function main() {
  const rl = readline.createInterface({ input: process.stdin, terminal: false });
  for await (const line of rl) {
    if (!line.trim()) {
      continue;
    }
    let resp;
    try {
      const req = JSON.parse(line);
      if (req.cmd === 'info') {
        resp = { ort: ort.env.versions ? ort.env.versions.common || JSON.stringify(ort.env.versions) : 'unknown', node: process.version };
      } else if (req.cmd === 'time') {
        resp = await time(req);
      } else {
        throw new Error('unknown cmd ' + req.cmd);
      }
    } catch (e) {
      resp = { error: String(e && e.message ? e.message : e) };
    }
    process.stdout.write(JSON.stringify(resp) + '\n');
  }
}

main();
