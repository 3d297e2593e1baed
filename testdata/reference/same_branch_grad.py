#!/usr/bin/python3
"""Float64 gradient of a full-size export on the branches another runtime took.

A ReLU network's input gradient is piecewise: it depends on which side of
zero each ReLU input lies (and of 0 and 6 for ReLU6, exported as Clip). In
float32 a few of millions of units lie within rounding of their kink and
take either side depending on summation order (relu_flips.py), and the
gradient jumps with them. On a fixed choice of sides the function is smooth,
and the gradient of that piece is well conditioned. This script computes,
in float64, the gradient of the exported graph's function on exactly the
branches a runtime under test took, so that runtime's float32 gradient can
be held to the issue's own bounds without blaming it for a side choice.

Input (written by engine/networks_test.go): BRANCHES.json, a list of
{"op": "Relu" | "Clip" | "MaxPool", "output": name, "shape": [...]} for
every Relu, Clip and MaxPool node of model.onnx in graph order (for MaxPool
the node's input, for the others its output), and BRANCHES.f32, the
runtime's values of those tensors concatenated (little-endian float32). The
k-th entry is matched to the k-th relu/hardtanh/max-pool call of the
torchvision forward pass (torch.onnx.export records nodes in call order);
shapes must agree and every entry must be used, else the script fails. A
ReLU is taken as active where the runtime's output is > 0; a Clip(lo, hi)
as passing where lo < output < hi, else clamped to the bound it reached; a
max-pool window routes to the argmax of the runtime's input values.

Output: OUT_DIR/grad_input_branch.pb and OUT_DIR/grad_layer_branch.pb
(float64 TensorProto), the gradients of sum_batch logit[class] on those
branches, and OUT_DIR/branch_flips.json, how many units the runtime put on
the other side than float64's own forward.

Run: /usr/bin/python3 testdata/reference/same_branch_grad.py EXPORT_DIR/NAME BRANCHES.json BRANCHES.f32 OUT_DIR
"""
import copy
import json
import os
import sys

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import export_nets as E  # noqa: E402
import relu_flips as R  # noqa: E402

KINDS = ("relu", "hardtanh", "maxpool")


def main():
    if len(sys.argv) != 5:
        raise SystemExit(__doc__)
    d, jpath, bpath, out = sys.argv[1:]
    with open(os.path.join(d, "meta.json")) as f:
        name = json.load(f)["name"]
    with open(jpath) as f:
        index = json.load(f) or []  # a net without Relu or Clip nodes
    flat = np.fromfile(bpath, dtype="<f4")
    torch.set_num_threads(2)
    gm, capture, x = R.load_export(d, name)
    m64 = copy.deepcopy(gm).double()

    # Record the call order and bounds in float64 to turn the runtime's
    # values into branch masks.
    rec = R.Pattern("record", kinds=KINDS)
    with torch.no_grad(), rec:
        capture(m64, x.double())
    if len(rec.pats) != len(index):
        raise SystemExit(f"{name}: {len(index)} Relu/Clip/MaxPool nodes in the graph, {len(rec.pats)} relu/hardtanh/max-pool calls in torch")
    ref, off = [], 0
    bounds, pools = iter(rec.bounds), iter(rec.pools)
    for i, (ent, (kind, pat)) in enumerate(zip(index, rec.pats)):
        shape = tuple(ent["shape"])
        want = {"Relu": "relu", "Clip": "hardtanh", "MaxPool": "maxpool"}[ent["op"]]
        n = int(np.prod(shape))
        y = torch.from_numpy(flat[off:off + n].reshape(shape).astype(np.float64))
        off += n
        if kind == "maxpool":
            # ent is the pool's input: its argmax taken on the runtime's values
            # (exact in float64, so the comparisons are the runtime's own).
            _, idx = torch._C._nn.max_pool2d_with_indices(y, *next(pools))
            y = idx
        if kind != want or tuple(pat[0].shape) != tuple(y.shape):
            raise SystemExit(f"{name}: node {i} {ent['op']} {ent['output']} {shape} vs torch call {kind} {tuple(pat[0].shape)}")
        if kind == "maxpool":
            ref.append((kind, (idx,)))
        elif kind == "relu":
            ref.append((kind, (y > 0,)))
        else:
            lo, hi = next(bounds)
            ref.append((kind, (y > lo, y < hi)))
    if off != flat.size:
        raise SystemExit(f"{name}: {flat.size} values in {bpath}, index describes {off}")
    flips = {}
    for (kind, a), (_, b) in zip(ref, rec.pats):
        flips[kind] = flips.get(kind, 0) + int(sum((p != q).sum() for p, q in zip(a, b)))

    xx = x.double().requires_grad_(True)
    with R.Pattern("force", ref, kinds=KINDS):
        logits, act = capture(m64, xx)
    gx, ga = torch.autograd.grad(logits[:, E.CLASS_INDEX].sum(), [xx, act])
    os.makedirs(out, exist_ok=True)
    E.tensor_pb(gx.numpy(), "grad_input", os.path.join(out, "grad_input_branch.pb"))
    E.tensor_pb(ga.numpy(), "grad_layer", os.path.join(out, "grad_layer_branch.pb"))
    with open(os.path.join(out, "branch_flips.json"), "w") as f:
        json.dump(flips, f)
    print(f"{name}: {len(index)} Relu/Clip/MaxPool nodes; units on the other side than float64: {flips}", flush=True)


if __name__ == "__main__":
    main()
