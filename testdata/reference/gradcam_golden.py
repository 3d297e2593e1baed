#!/usr/bin/python3
"""Grad-CAM goldens computed in PyTorch, for heedmap's explain.GradCAM.

Grad-CAM (Selvaraju et al., ICCV 2017, eqs. 1-2) is computed here the way it
is usually done in PyTorch: a forward hook on the module that produces the
activation A keeps A, a hook on that tensor keeps dy/dA during backward, then

    alpha_k = mean_ij dy/dA_kij      (y = pre-softmax logit of the class)
    L       = ReLU(sum_k alpha_k A_k)

and L is upsampled to the input size with
F.interpolate(mode="bilinear", align_corners=False), the half-pixel
convention explain.Upsample states. Nothing is taken from the Go side.

The networks are rebuilt exactly as export_nets.py builds them (its builders,
randomise() and seeds are imported), and the script stops unless the rebuilt
model reproduces the committed logits.pb on the committed input.pb, so the
goldens belong to the committed model.onnx.

For each net it writes, beside the net (image 0 of input.pb):

  testdata/nets/<name>/gradcam_coarse.npy  L at the layer's resolution for
                                           every class, [K, h, w]
  testdata/nets/<name>/gradcam.npy         L upsampled to the input [H, W] for
                                           one class c: the predicted class,
                                           or the best-scoring class whose L
                                           is not all zero (with these random
                                           weights and a 2x2 layer a class's
                                           L is often entirely negative
                                           before the ReLU)
  testdata/nets/<name>/gradcam.json        {"class": c, "classes": K}

Run from the repository root (a minute or two on 2 cores):
    /usr/bin/python3 testdata/reference/gradcam_golden.py [NET ...]
For the full-size networks written by export_nets.py --full --out DIR (not
committed; explain's opt-in test reads them from HEEDMAP_FULL_NETS=DIR):
    /usr/bin/python3 testdata/reference/gradcam_golden.py --full DIR [NET ...]
Debian python3-torch 1.13, python3-torchvision 0.14, python3-onnx 1.12.
"""
import json
import os
import sys

import numpy as np
import torch
import torch.nn as nn
import torch.nn.functional as F
from onnx import numpy_helper, TensorProto

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import export_nets as ex  # noqa: E402

NETS_DIR = os.path.join(HERE, "..", "nets")


class DenseHead(nn.Module):
    """DenseNet.forward (features, F.relu, global average pool, flatten,
    classifier) with the ReLU as a module, so that a forward hook can see
    the activation the ONNX graph names (/Relu_output_0)."""

    def __init__(self, m):
        super().__init__()
        self.m = m
        self.relu = nn.ReLU()

    def forward(self, x):
        a = self.relu(self.m.features(x))
        return self.m.classifier(torch.flatten(F.adaptive_avg_pool2d(a, (1, 1)), 1))


# Module whose output is the layer named in meta.json (checked by shape and
# by export_nets.py's own capture, which hooks the same modules).
HOOKS = {
    "resnet18": lambda m: (m, m.layer4),
    "mobilenet_v2": lambda m: (m, m.features),
    "mobilenet_v3": lambda m: (m, m.features),
    "efficientnet_b0": lambda m: (m, m.features),
    "densenet121": lambda m: (lambda w: (w, w.relu))(DenseHead(m)),
    "inception_v3": lambda m: (m, m.Mixed_7c),
    "convnext_tiny": lambda m: (m, m.features),
}


def load_pb(path):
    t = TensorProto()
    with open(path, "rb") as f:
        t.ParseFromString(f.read())
    return numpy_helper.to_array(t)


def rebuild(name, full=False):
    names = list(ex.NETS)
    seed = 1000 + names.index(name)  # as export_nets.main
    torch.manual_seed(seed)
    gen = torch.Generator().manual_seed(seed)
    model, size, _ = ex.NETS[name][1 if full else 0]()
    ex.randomise(model, size, gen)
    return model.eval(), size


def grad_cam(model, module, x, cls):
    """Grad-CAM of logit cls for the single image x, by hooks."""
    box = {}

    def fwd(_m, _i, out):
        box["A"] = out
        out.register_hook(lambda g: box.__setitem__("dA", g))

    h = module.register_forward_hook(fwd)
    try:
        logits = model(x)
        model.zero_grad()
        logits[0, cls].backward()
    finally:
        h.remove()
    a, da = box["A"].detach(), box["dA"].detach()
    alpha = da.mean(dim=(2, 3), keepdim=True)
    cam = F.relu((alpha * a).sum(dim=1, keepdim=True))
    up = F.interpolate(cam, size=x.shape[2:], mode="bilinear", align_corners=False)
    return logits.detach(), a, cam[0, 0].numpy(), up[0, 0].numpy()


def main():
    torch.set_num_threads(2)
    args, full, nets_dir = sys.argv[1:], False, NETS_DIR
    if args[:1] == ["--full"]:
        if len(args) < 2:
            raise SystemExit("--full needs the directory export_nets.py --full wrote")
        full, nets_dir, args = True, args[1], args[2:]
    names = args or list(HOOKS)
    for name in names:
        d = os.path.join(nets_dir, name)
        with open(os.path.join(d, "meta.json")) as f:
            meta = json.load(f)
        model, size = rebuild(name, full)
        x_all = torch.from_numpy(load_pb(os.path.join(d, "input.pb")).copy())
        want = load_pb(os.path.join(d, "logits.pb"))
        with torch.no_grad():
            got = model(x_all).numpy()
        if not np.allclose(got, want, rtol=1e-5, atol=1e-5):
            raise SystemExit(f"{name}: rebuilt model does not reproduce logits.pb (max diff {np.abs(got - want).max()})")
        layer_shape = load_pb(os.path.join(d, "layer.pb")).shape
        wrapped, module = HOOKS[name](model)
        x = x_all[:1].clone().requires_grad_(True)
        k = want.shape[1]
        coarse, ups = [], []
        for cls in range(k):
            logits, a, c, up = grad_cam(wrapped, module, x, cls)
            if tuple(a.shape[1:]) != tuple(layer_shape[1:]):
                raise SystemExit(f"{name}: hooked activation {list(a.shape)} is not the layer {meta['layer']} {list(layer_shape)}")
            if not np.allclose(logits.numpy(), want[:1], rtol=1e-5, atol=1e-5):
                raise SystemExit(f"{name}: hooked forward differs from logits.pb")
            coarse.append(c)
            ups.append(up)
        order = np.argsort(-want[0], kind="stable")
        chosen = next((int(c) for c in order if coarse[c].max() > 0), None)
        if chosen is None:
            raise SystemExit(f"{name}: Grad-CAM is zero for every class")
        coarse = np.stack(coarse)
        np.save(os.path.join(d, "gradcam_coarse.npy"), coarse.astype("<f4"))
        np.save(os.path.join(d, "gradcam.npy"), ups[chosen].astype("<f4"))
        with open(os.path.join(d, "gradcam.json"), "w") as f:
            json.dump({"class": chosen, "classes": int(k), "script": "testdata/reference/gradcam_golden.py",
                       "torch": torch.__version__}, f, indent=1)
            f.write("\n")
        a_shape = list(a.shape)
        print(f"{name}: layer {meta['layer']} {a_shape}, class {chosen} (predicted {int(order[0])}), "
              f"zero maps for {int((coarse.reshape(k, -1).max(axis=1) <= 0).sum())} of {k} classes", flush=True)


if __name__ == "__main__":
    main()
