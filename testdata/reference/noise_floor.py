#!/usr/bin/python3
"""How reproducible is a full-size ReLU network's input gradient in float32?

Measures, for the full-size networks of export_nets.py (same seeds, weights
and input), how far PyTorch's own input gradient moves when
  (a) it is computed in float64 instead of float32, and
  (b) each BatchNorm is folded into the convolution before it, as
      torch.onnx.export does with do_constant_folding in eval mode.
ReLU/ReLU6 and max-pool derivatives are discontinuous, so rounding-level
changes flip some units; at 224x224 this alone moves the gradient by more
than the 1e-3 relative L2 that engine/networks_test.go asks of the runtime.
Only for nets whose every BatchNorm directly follows a Conv in module order
(resnet18, mobilenet_v2, mobilenet_v3, efficientnet_b0).

Run: /usr/bin/python3 testdata/reference/noise_floor.py resnet18 mobilenet_v2
"""
import copy
import os
import sys

import torch
import torch.nn as nn
from torch.nn.utils.fusion import fuse_conv_bn_eval

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import export_nets as E  # noqa: E402

SAFE = {"resnet18", "mobilenet_v2", "mobilenet_v3", "efficientnet_b0"}


def input_grad(model, x):
    x = x.clone().requires_grad_(True)
    score = model(x)[:, E.CLASS_INDEX].sum()
    return torch.autograd.grad(score, x)[0].double()


def fold_bn(model):
    """Fold each BatchNorm2d into the Conv2d registered just before it."""
    m = copy.deepcopy(model)
    mods = dict(m.named_modules())

    def parent(name):
        return mods[name.rsplit(".", 1)[0]] if "." in name else m

    prev = None
    for name, mod in list(m.named_modules()):
        if isinstance(mod, nn.BatchNorm2d) and prev is not None and isinstance(prev[1], nn.Conv2d):
            setattr(parent(prev[0]), prev[0].rsplit(".", 1)[-1], fuse_conv_bn_eval(prev[1], mod))
            setattr(parent(name), name.rsplit(".", 1)[-1], nn.Identity())
        if isinstance(mod, (nn.Conv2d, nn.BatchNorm2d)):
            prev = (name, mod)
    return m


def compare(a, b):
    rel = ((a - b).norm() / b.norm()).item()
    cos = (a.flatten() @ b.flatten() / (a.norm() * b.norm())).item()
    return f"relative L2 {rel:.2e}, cosine {cos:.6f}"


def main():
    torch.set_num_threads(2)
    for name in sys.argv[1:] or ["resnet18"]:
        if name not in SAFE:
            raise SystemExit(f"{name}: BatchNorm folding by module order is not valid for this net")
        seed = 1000 + list(E.NETS).index(name)
        torch.manual_seed(seed)
        gen = torch.Generator().manual_seed(seed)
        model, size, _ = E.NETS[name][1]()
        E.randomise(model, size, gen)
        torch.randn(1, 3, size, size, generator=gen)  # export_nets' dummy input
        x = torch.randn(E.BATCH, 3, size, size, generator=gen)
        g32 = input_grad(model, x)
        g64 = input_grad(copy.deepcopy(model).double(), x.double())
        gfold = input_grad(fold_bn(model), x)
        print(f"{name}: float32 vs float64: {compare(g32, g64)}; "
              f"BN-folded float32 vs unfolded float32: {compare(gfold, g32)}", flush=True)


if __name__ == "__main__":
    main()
