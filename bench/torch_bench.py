#!/usr/bin/python3
"""PyTorch reference run for heedmap's side-by-side benchmark.

Usage: /usr/bin/python3 bench/torch_bench.py   (started by bench/cmd/heedbench,
which writes requests on its stdin). It first prints {"torch_version": ...};
then each request line {"op": "time", ...} gets one reply line with the
timing of one model, batch size and pass.

The networks are rebuilt with the committed reference script's builders and
randomisation (testdata/reference/export_nets.py, full-size variants, the
same seeds as its export), so PyTorch runs the architectures, and the
weights, that heedmap and ONNX Runtime load from the exported ONNX files;
the logits are returned so the driver can check that.

Forward runs under torch.no_grad(); forward+backward takes the gradient of
the summed class logit with respect to the input only (parameters do not
require gradients), which is what attribution needs. Two intra-op threads.
"""
import json
import os
import sys
import time

import numpy
import torch

torch.set_num_interop_threads(1)  # before any parallel work, as PyTorch requires

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "testdata", "reference"))
import export_nets  # noqa: E402


def build(name, cache):
    # Mirrors export_nets.main/export: seed 1000 + position in NETS. The
    # randomised weights are cached in the run's scratch directory because
    # re-estimating BatchNorm statistics is slow on a busy machine.
    seed = 1000 + list(export_nets.NETS).index(name)
    torch.manual_seed(seed)
    gen = torch.Generator().manual_seed(seed)
    model, size, _ = export_nets.NETS[name][1]()
    path = os.path.join(cache, name + "_torch_weights.pt") if cache else ""
    if path and os.path.exists(path):
        model.load_state_dict(torch.load(path))
    else:
        export_nets.randomise(model, size, gen)
        if path:
            torch.save(model.state_dict(), path)
    model.eval()
    for p in model.parameters():
        p.requires_grad_(False)
    return model


def main():
    # Worker mode: one JSON request per line on stdin, one JSON reply per
    # line on stdout, so the driver can give PyTorch its turn of a
    # configuration right after the other engines' (all see the machine in
    # the same state). Models are built once and kept.
    reply = lambda obj: (json.dump(obj, sys.stdout), sys.stdout.write("\n"), sys.stdout.flush())
    reply({"torch_version": torch.__version__})
    models = {}
    threads = None
    for line in sys.stdin:
        if not line.strip():
            continue
        req = json.loads(line)
        if req.get("op") != "time":
            raise SystemExit("torch_bench.py: unknown request %r" % req.get("op"))
        if threads != req["threads"]:
            threads = req["threads"]
            torch.set_num_threads(threads)
        c, h, w = req["shape"]
        img = torch.from_numpy(numpy.fromfile(req["image"], dtype="<f4").reshape(1, c, h, w).copy())
        cls = req["class"]
        name = req["name"]
        if name not in models:
            models[name] = build(name, req.get("cache", ""))
        model = models[name]
        x = img.repeat(req["batch"], 1, 1, 1)
        if req["backward"]:
            def step():
                xx = x.clone().requires_grad_(True)
                logits = model(xx)
                (g,) = torch.autograd.grad(logits[:, cls].sum(), [xx])
                return logits
        else:
            def step():
                with torch.no_grad():
                    return model(x)
        for _ in range(req["warmup"]):
            logits = step()
        # At least req["iters"] iterations and at least req["min_seconds"].
        t0 = time.perf_counter()
        n = 0
        while n < req["iters"] or time.perf_counter() - t0 < req.get("min_seconds", 0):
            step()
            n += 1
        secs = time.perf_counter() - t0
        reply({"name": name, "batch": req["batch"], "backward": req["backward"], "iters": n,
               "seconds": secs, "logits": logits[0].detach().tolist()})


if __name__ == "__main__":
    main()
