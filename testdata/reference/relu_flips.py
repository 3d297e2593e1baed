#!/usr/bin/python3
"""Is a full-size net's float32 input-gradient error all due to flipped units?

For full-size nets exported by export_nets.py --full (same seed, weights and
input; model.onnx and input.pb read from DIR/<name>/), evaluates the
exported graph's own function (export_nets.graph_model) in float64 and
records, call by call, the pattern of every piecewise-linear unit: the sign
of each ReLU input, which side of each ReLU6/hardtanh bound each input lies
on, and each max-pool window's argmax. Then, for PyTorch float32 evaluations
of the same graph (the "implementation" runs of export_nets.float32_spread),
it prints
  - how many units take the other branch than in float64 ("flips"), and
  - the input gradient's relative L2 error against float64, as computed and
    with every piecewise-linear unit forced onto float64's branch (ReLU(z)
    -> z*mask64, hardtanh -> z*mid64 + bounds, max-pool -> gather at
    float64's argmax; same float32 arithmetic otherwise).
If the forced error is at the level of a smooth net (about 1e-5) while the
computed one is at 1e-3..1e-2, the excess comes from branch flips of units
whose input lies within float32 rounding of a kink, not from any operator:
the input gradient is a discontinuous function of the input there, and no
float32 evaluation can be held to the float64 value more tightly than its
own branch choices allow.

Run: /usr/bin/python3 testdata/reference/relu_flips.py DIR resnet18 inception_v3
"""
import contextlib
import copy
import inspect
import os
import sys

import numpy as np
import onnx
import torch
import torch.nn.functional as F
from onnx import numpy_helper
from torch.overrides import TorchFunctionMode

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import export_nets as E  # noqa: E402

_POOL = inspect.signature(F.max_pool2d_with_indices)
_HT = inspect.signature(F.hardtanh)


class Pattern(TorchFunctionMode):
    """Records (mode "record"), compares against (mode "count") or imposes
    (mode "force") the branch pattern of ReLU, hardtanh and max-pool calls,
    matched by call order."""

    def __init__(self, mode, ref=None, kinds=("relu", "hardtanh", "maxpool")):
        super().__init__()
        self.mode, self.ref, self.kinds, self.pats, self.flips, self.units = mode, ref, kinds, [], {}, {}
        self.bounds = []  # (min_val, max_val) of each hardtanh call
        self.pools = []  # (kernel, stride, padding, dilation, ceil_mode) of each max-pool call

    def _next(self, kind, pat):
        i = len(self.pats)
        self.pats.append((kind, pat))
        if self.ref is None:
            return None
        rk, rp = self.ref[i]
        if rk != kind or rp[0].shape != pat[0].shape:
            raise SystemExit(f"call {i}: {kind} {tuple(pat[0].shape)} vs float64 {rk} {tuple(rp[0].shape)}")
        if self.mode == "count":
            self.flips[kind] = self.flips.get(kind, 0) + int(sum((a != b).sum() for a, b in zip(pat, rp)))
            self.units[kind] = self.units.get(kind, 0) + pat[0].numel()
        return rp

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        name = getattr(func, "__name__", "")
        kind = {"relu": "relu", "hardtanh": "hardtanh", "max_pool2d": "maxpool",
                "_max_pool2d": "maxpool", "max_pool2d_with_indices": "maxpool"}.get(name)
        if kind not in self.kinds:
            return func(*args, **kwargs)
        if name == "relu":
            z = args[0]
            rp = self._next("relu", ((z > 0).detach(),))
            if self.mode == "force":
                return z * rp[0].to(z.dtype)
        elif name == "hardtanh":
            b = _HT.bind(*args, **kwargs)
            b.apply_defaults()
            z, lo, hi = b.arguments["input"], b.arguments["min_val"], b.arguments["max_val"]
            self.bounds.append((lo, hi))
            rp = self._next("hardtanh", ((z > lo).detach(), (z < hi).detach()))
            if self.mode == "force":
                mid = (rp[0] & rp[1]).to(z.dtype)
                return z * mid + lo * (~rp[0]).to(z.dtype) + hi * (~rp[1]).to(z.dtype)
        elif name in ("max_pool2d", "_max_pool2d", "max_pool2d_with_indices"):
            b = _POOL.bind(*args, **kwargs)
            b.apply_defaults()
            a = dict(b.arguments)
            want_idx = a.pop("return_indices")
            params = (a["kernel_size"], a["stride"] or a["kernel_size"], a["padding"], a["dilation"], a["ceil_mode"])
            self.pools.append(params)
            out, idx = torch._C._nn.max_pool2d_with_indices(a["input"], *params)
            rp = self._next("maxpool", (idx,))
            if self.mode == "force":
                z = a["input"]
                out = z.flatten(2).gather(2, rp[0].flatten(2)).view(rp[0].shape)
            return (out, idx) if want_idx else out
        return func(*args, **kwargs)


def input_grad(m, capture, x, mode):
    x = x.detach().clone().requires_grad_(True)
    with mode:
        logits, _ = capture(m, x)
    return torch.autograd.grad(logits[:, E.CLASS_INDEX].sum(), x)[0].double()


def rel(a, b):
    return ((a - b).norm() / b.norm()).item()


def load_export(d, name):
    """Rebuilds the exported graph's function for the full-size net exported
    to directory d (same seed as export_nets.py) and checks it reproduces
    the export's own float32 graph logits (logits_g32.pb). Returns
    (graph model, capture, input)."""
    seed = 1000 + list(E.NETS).index(name)
    torch.manual_seed(seed)
    gen = torch.Generator().manual_seed(seed)
    model, size, capture = E.NETS[name][1]()
    E.randomise(model, size, gen)
    gm = E.graph_model(model, os.path.join(d, "model.onnx"))
    x = torch.from_numpy(numpy_helper.to_array(onnx.load_tensor(os.path.join(d, "input.pb"))).copy())
    want = numpy_helper.to_array(onnx.load_tensor(os.path.join(d, "logits_g32.pb")))
    with torch.no_grad():
        got = capture(gm, x)[0].numpy()
    if np.abs(got - want).max() > 1e-5 * np.abs(want).max():
        raise SystemExit(f"{d}: rebuilt {name} does not reproduce the export's logits_g32.pb")
    return gm, capture, x


def main():
    if len(sys.argv) < 3:
        raise SystemExit(__doc__)
    out = sys.argv[1]
    for name in sys.argv[2:]:
        torch.set_num_threads(2)
        gm, capture, x = load_export(os.path.join(out, name), name)
        rec = Pattern("record")
        g64 = input_grad(copy.deepcopy(gm).double(), capture, x.double(), rec)
        units = {}
        for k, p in rec.pats:
            units[k] = units.get(k, 0) + p[0].numel()
        print(f"{name}: piecewise-linear units per pass: {units}", flush=True)
        variants = [
            ("threads2", 2, lambda: (gm, x, contextlib.nullcontext())),
            ("threads1", 1, lambda: (gm, x, contextlib.nullcontext())),
            ("channels_last", 2, lambda: (copy.deepcopy(gm).to(memory_format=torch.channels_last),
                                          x.contiguous(memory_format=torch.channels_last), contextlib.nullcontext())),
            ("no_mkldnn", 2, lambda: (gm, x, torch.backends.mkldnn.flags(enabled=False))),
        ]
        for vname, threads, make in variants:
            torch.set_num_threads(threads)
            m, xx, ctx = make()
            with ctx:
                cnt = Pattern("count", rec.pats)
                g = input_grad(m, capture, xx, cnt)
                gf = input_grad(m, capture, xx, Pattern("force", rec.pats))
            print(f"  float32 {vname:14s} flips {cnt.flips}  input grad rel L2 vs float64: "
                  f"computed {rel(g, g64):.2e}, on float64's branches {rel(gf, g64):.2e}", flush=True)
        torch.set_num_threads(2)


if __name__ == "__main__":
    main()
