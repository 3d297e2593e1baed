#!/usr/bin/python3
"""PyTorch reference run for heedmap's side-by-side benchmark.

Usage: /usr/bin/python3 bench/torch_bench.py SPEC.json   (written by
bench/cmd/heedbench). Prints one JSON object on stdout.

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

import torch

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
    spec = json.load(open(sys.argv[1]))
    torch.set_num_threads(spec["threads"])
    torch.set_num_interop_threads(1)
    c, h, w = spec["shape"]
    img = torch.from_numpy(__import__("numpy").fromfile(spec["image"], dtype="<f4").reshape(1, c, h, w).copy())
    cls = spec["class"]
    out = {"torch_version": torch.__version__, "runs": []}
    models = {}
    for job in spec["jobs"]:
        name = job["name"]
        if name not in models:
            models[name] = build(name, spec.get("cache", ""))
        model = models[name]
        x = img.repeat(job["batch"], 1, 1, 1)
        if job["backward"]:
            def step():
                xx = x.clone().requires_grad_(True)
                logits = model(xx)
                (g,) = torch.autograd.grad(logits[:, cls].sum(), [xx])
                return logits
        else:
            def step():
                with torch.no_grad():
                    return model(x)
        for _ in range(job["warmup"]):
            logits = step()
        t0 = time.perf_counter()
        for _ in range(job["iters"]):
            step()
        secs = time.perf_counter() - t0
        out["runs"].append({"name": name, "batch": job["batch"], "backward": job["backward"], "iters": job["iters"],
                            "seconds": secs, "logits": logits[0].detach().tolist()})
    json.dump(out, sys.stdout)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
