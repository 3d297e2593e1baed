#!/usr/bin/python3
"""Reference ONNX exports and PyTorch gradient goldens for heedmap's runtime.

What it makes: for each of eight classifier architectures (ResNet-18,
MobileNetV2, MobileNetV3, EfficientNet-B0, DenseNet-121, Inception-v3,
ConvNeXt-Tiny, ViT-B/16) a compact variant built from torchvision's own
classes and blocks (same block types, fewer channels/blocks, small input),
with random weights, exported to ONNX (opset 13, dynamic batch axis,
constant folding), and golden tensors computed by PyTorch autograd:

  testdata/nets/<name>/model.onnx     the exported network
  testdata/nets/<name>/input.pb       fixed random input x, batch 2
  testdata/nets/<name>/logits.pb      PyTorch logits for x
  testdata/nets/<name>/grad_input.pb  d(sum over batch of logit[class]) / dx
  testdata/nets/<name>/layer.pb       value of one inner activation
  testdata/nets/<name>/grad_layer.pb  d(same score) / d(that activation)
  testdata/nets/<name>/meta.json      tensor names (input, output, layer),
                                      class index, versions

All .pb files are ONNX TensorProto (onnx.numpy_helper.from_array), read in Go
with onnx.LoadTensor. engine/networks_test.go checks the Go runtime against
them.

Random weights: a freshly initialised BatchNorm is an identity and makes a
random net almost input-independent, so every BatchNorm gets a random affine
transform and running statistics re-estimated on random images (train-mode
passes with momentum=None, i.e. a cumulative average); LayerNorm affine and
ConvNeXt layer scale are randomised too.

Rerun (from the repository root; takes about a minute on 2 cores):
    /usr/bin/python3 testdata/reference/export_nets.py
Full-size torchvision architectures (random weights, 224x224 / 299x299;
hundreds of MB, never committed) for the opt-in test, with goldens of the
exported graph in float64 and float32 (*_f64.pb, *_g32.pb; see
float64_goldens) and, in meta.json's "float32_spread", the distance of
several PyTorch float32 evaluations from the float64 goldens (see
float32_spread):
    /usr/bin/python3 testdata/reference/export_nets.py --full --out DIR [NAME...]
Versions used for the committed files: Debian python3-torch 1.13,
python3-torchvision 0.14, python3-onnx 1.12 (printed into meta.json).
"""
import argparse
import contextlib
import copy
import functools
import json
import os
import sys

import numpy as np
import onnx
import torch
import torch.nn as nn
import torch.nn.functional as F
import torchvision
from onnx import numpy_helper
from torchvision.models import convnext, densenet, efficientnet, inception, mobilenetv2, mobilenetv3, resnet
from torchvision.models import vision_transformer

NUM_CLASSES = 10
CLASS_INDEX = 3  # the class whose logit the gradient goldens differentiate
BATCH = 2
OPSET = 13


# ---------------------------------------------------------------- compact nets
# Each builder returns (model, image size, capture) where capture(model, x)
# runs the model's own forward and returns (logits, inner activation) so the
# activation's gradient can be taken. The activation is the last 4-D tensor
# before global pooling (for ViT, the last encoder block's token tensor).

def _features_capture(model, x):
    """Capture the output of model.features via a forward hook."""
    box = {}
    h = model.features.register_forward_hook(lambda m, i, o: box.setdefault("a", o))
    try:
        logits = model(x)
    finally:
        h.remove()
    return logits, box["a"]


def _module_capture(name):
    def capture(model, x):
        box = {}
        h = getattr(model, name).register_forward_hook(lambda m, i, o: box.setdefault("a", o))
        try:
            logits = model(x)
        finally:
            h.remove()
        return logits, box["a"]
    return capture


def resnet18_small():
    # torchvision's ResNet with BasicBlock and ResNet-18's [2, 2, 2, 2]
    # layout; stages rebuilt with torchvision's own _make_layer at widths
    # 8/16/32/64 instead of 64..512 (ResNet hard-codes its widths).
    m = resnet.ResNet(resnet.BasicBlock, [2, 2, 2, 2], num_classes=NUM_CLASSES)
    widths = [8, 16, 32, 64]
    m.inplanes = widths[0]
    m.conv1 = nn.Conv2d(3, widths[0], kernel_size=7, stride=2, padding=3, bias=False)
    m.bn1 = nn.BatchNorm2d(widths[0])
    m.layer1 = m._make_layer(resnet.BasicBlock, widths[0], 2)
    m.layer2 = m._make_layer(resnet.BasicBlock, widths[1], 2, stride=2)
    m.layer3 = m._make_layer(resnet.BasicBlock, widths[2], 2, stride=2)
    m.layer4 = m._make_layer(resnet.BasicBlock, widths[3], 2, stride=2)
    m.fc = nn.Linear(widths[3], NUM_CLASSES)
    return m, 64, _module_capture("layer4")


def resnet18_full():
    return torchvision.models.resnet18(num_classes=NUM_CLASSES), 224, _module_capture("layer4")


def mobilenet_v2_small():
    # MobileNetV2's inverted-residual table with fewer repeats, width 0.35.
    setting = [[1, 16, 1, 1], [6, 24, 2, 2], [6, 32, 2, 2], [6, 64, 2, 2], [6, 96, 1, 1], [6, 160, 2, 2], [6, 320, 1, 1]]
    m = mobilenetv2.MobileNetV2(num_classes=NUM_CLASSES, width_mult=0.35, inverted_residual_setting=setting)
    # last_channel stays 1280 in torchvision for width < 1; shrink the head.
    last = m.features[-1][0].in_channels
    m.features[-1] = mobilenetv2.Conv2dNormActivation(last, 256, kernel_size=1, activation_layer=nn.ReLU6)
    m.classifier[1] = nn.Linear(256, NUM_CLASSES)
    return m, 64, _features_capture


def mobilenet_v2_full():
    return torchvision.models.mobilenet_v2(num_classes=NUM_CLASSES), 224, _features_capture


def mobilenet_v3_small():
    # MobileNetV3-Small blocks (HardSwish, squeeze-excitation with
    # HardSigmoid) at width 0.5 with the reduced tail.
    setting, last = mobilenetv3._mobilenet_v3_conf("mobilenet_v3_small", width_mult=0.5, reduced_tail=True)
    m = mobilenetv3.MobileNetV3(setting, last, num_classes=NUM_CLASSES)
    return m, 64, _features_capture


def mobilenet_v3_full():
    return torchvision.models.mobilenet_v3_large(num_classes=NUM_CLASSES), 224, _features_capture


def efficientnet_b0_small():
    # EfficientNet-B0's MBConv table (SiLU, squeeze-excitation) scaled by
    # width 0.25 and depth 0.34.
    setting, last = efficientnet._efficientnet_conf("efficientnet_b0", width_mult=0.25, depth_mult=0.34)
    m = efficientnet.EfficientNet(setting, dropout=0.2, stochastic_depth_prob=0.0, num_classes=NUM_CLASSES, last_channel=last)
    return m, 64, _features_capture


def efficientnet_b0_full():
    return torchvision.models.efficientnet_b0(num_classes=NUM_CLASSES), 224, _features_capture


def _densenet_capture(model, x):
    # DenseNet.forward applies F.relu after model.features; the activation
    # before global pooling is that ReLU's output, so replay the forward
    # (same ops, same order) keeping it.
    f = model.features(x)
    a = F.relu(f, inplace=False)
    out = F.adaptive_avg_pool2d(a, (1, 1))
    out = torch.flatten(out, 1)
    return model.classifier(out), a


def densenet121_small():
    # DenseNet-121's dense blocks and transitions with growth 8, blocks
    # (2, 3, 4, 3) instead of (6, 12, 24, 16), 16 initial features.
    m = densenet.DenseNet(growth_rate=8, block_config=(2, 3, 4, 3), num_init_features=16, bn_size=4, num_classes=NUM_CLASSES)
    return m, 64, _densenet_capture


def densenet121_full():
    return torchvision.models.densenet121(num_classes=NUM_CLASSES), 224, _densenet_capture


def _thin_conv(divisor):
    """BasicConv2d factory dividing every channel count but the image's."""
    def make(in_channels, out_channels, **kwargs):
        cin = in_channels if in_channels == 3 else in_channels // divisor
        return inception.BasicConv2d(cin, out_channels // divisor, **kwargs)
    return make


def inception_v3_small():
    # The complete Inception-v3 topology (stem, 3xA, B, 4xC, D, 2xE) built by
    # torchvision's Inception3 from its own blocks, every channel count
    # divided by 16 through the blocks' conv_block hook; 139x139 input keeps
    # a 3x3 map before pooling. Inception3's fc is hard-wired to 2048 inputs.
    conv = _thin_conv(16)
    blocks = [conv] + [functools.partial(b, conv_block=conv) for b in (
        inception.InceptionA, inception.InceptionB, inception.InceptionC,
        inception.InceptionD, inception.InceptionE, inception.InceptionAux)]
    m = inception.Inception3(num_classes=NUM_CLASSES, aux_logits=False, inception_blocks=blocks, init_weights=True)
    m.fc = nn.Linear(2048 // 16, NUM_CLASSES)
    return m, 139, _module_capture("Mixed_7c")


def inception_v3_full():
    m = torchvision.models.inception_v3(num_classes=NUM_CLASSES, aux_logits=False, init_weights=True)
    return m, 299, _module_capture("Mixed_7c")


def convnext_tiny_small():
    # ConvNeXt-Tiny's CNBlock (depthwise 7x7, LayerNorm, GELU, layer scale)
    # at widths 16..128 with one block per stage instead of (3, 3, 9, 3).
    cfg = [convnext.CNBlockConfig(16, 32, 1), convnext.CNBlockConfig(32, 64, 1),
           convnext.CNBlockConfig(64, 128, 2), convnext.CNBlockConfig(128, None, 1)]
    m = convnext.ConvNeXt(cfg, stochastic_depth_prob=0.0, num_classes=NUM_CLASSES)
    return m, 64, _features_capture


def convnext_tiny_full():
    return torchvision.models.convnext_tiny(num_classes=NUM_CLASSES), 224, _features_capture


def _vit_capture(model, x):
    box = {}
    h = model.encoder.layers[-1].register_forward_hook(lambda m, i, o: box.setdefault("a", o))
    try:
        logits = model(x)
    finally:
        h.remove()
    return logits, box["a"]


def vit_b16_small():
    # ViT's patch embedding, class token, encoder blocks (LayerNorm,
    # multi-head self-attention, GELU MLP): 32x32 images, 8x8 patches,
    # 2 layers, 2 heads, width 32 instead of 224/16/12/12/768.
    m = vision_transformer.VisionTransformer(image_size=32, patch_size=8, num_layers=2, num_heads=2,
                                             hidden_dim=32, mlp_dim=64, num_classes=NUM_CLASSES)
    return m, 32, _vit_capture


def vit_b16_full():
    return torchvision.models.vit_b_16(num_classes=NUM_CLASSES), 224, _vit_capture


NETS = {
    "resnet18": (resnet18_small, resnet18_full),
    "mobilenet_v2": (mobilenet_v2_small, mobilenet_v2_full),
    "mobilenet_v3": (mobilenet_v3_small, mobilenet_v3_full),
    "efficientnet_b0": (efficientnet_b0_small, efficientnet_b0_full),
    "densenet121": (densenet121_small, densenet121_full),
    "inception_v3": (inception_v3_small, inception_v3_full),
    "convnext_tiny": (convnext_tiny_small, convnext_tiny_full),
    "vit_b16": (vit_b16_small, vit_b16_full),
}


# ------------------------------------------------------------- randomisation

@torch.no_grad()
def randomise(model, size, gen):
    """Random affine for every norm layer and layer scale, unit-variance
    linear layers; BatchNorm running statistics re-estimated on random
    images."""
    bns = []
    for mod in model.modules():
        if isinstance(mod, nn.modules.batchnorm._BatchNorm):
            mod.weight.copy_(torch.rand(mod.weight.shape, generator=gen) + 0.5)
            mod.bias.copy_(torch.randn(mod.bias.shape, generator=gen) * 0.2)
            mod.reset_running_stats()
            mod.momentum = None  # cumulative average over the passes below
            bns.append(mod)
        elif isinstance(mod, nn.LayerNorm) and mod.elementwise_affine:
            mod.weight.copy_(torch.rand(mod.weight.shape, generator=gen) + 0.5)
            mod.bias.copy_(torch.randn(mod.bias.shape, generator=gen) * 0.2)
        elif isinstance(mod, convnext.CNBlock):
            mod.layer_scale.copy_(torch.rand(mod.layer_scale.shape, generator=gen) * 0.5 + 0.5)
        elif isinstance(mod, nn.Linear):
            # Some heads start at zero (ViT) or near zero (MobileNetV3),
            # which would make logits constant or tiny.
            bound = 1 / mod.in_features ** 0.5
            mod.weight.copy_((torch.rand(mod.weight.shape, generator=gen) * 2 - 1) * bound * 3 ** 0.5)
            if mod.bias is not None:
                mod.bias.copy_((torch.rand(mod.bias.shape, generator=gen) * 2 - 1) * bound)
        elif isinstance(mod, vision_transformer.VisionTransformer):
            mod.class_token.copy_(torch.randn(mod.class_token.shape, generator=gen) * 0.5)
    model.eval()
    if bns:
        for bn in bns:
            bn.train()
        for _ in range(8):
            model(torch.randn(16, 3, size, size, generator=gen))
        model.eval()


# ------------------------------------------------------------------- export

def tensor_pb(arr, name, path):
    t = numpy_helper.from_array(np.ascontiguousarray(arr), name=name)
    with open(path, "wb") as f:
        f.write(t.SerializeToString())


def onnx_layer_name(graph, name, pool_ops=("GlobalAveragePool", "ReduceMean")):
    """The ONNX name of the inner activation: for CNNs the tensor that feeds
    the last global pooling (squeeze-excitation pools earlier); for ViT the
    output of the last encoder block."""
    if name.startswith("vit"):
        last = max(int(n.name.split("/encoder_layer_")[1].split("/")[0])
                   for n in graph.node if "/encoder_layer_" in n.name)
        adds = [n for n in graph.node if n.name.startswith(f"/encoder/layers/encoder_layer_{last}/") and n.op_type == "Add"]
        return adds[-1].output[0]
    for op in pool_ops:  # ConvNeXt's head LayerNorm also uses ReduceMean
        for n in reversed(graph.node):
            if n.op_type == op:
                return n.input[0]
    raise SystemExit(f"{name}: no global pooling node found")


def _scope_to_module(node_name):
    """Module path of an ONNX node named by torch.onnx's scopes, e.g.
    /features/features.1/conv/conv.0/conv.0.0/Conv -> features.1.conv.0.0
    (each scope component is an attribute name, or the previous component
    plus '.' and the child's name)."""
    comps = node_name.strip("/").split("/")[:-1]
    full, prev = comps[0], comps[0]
    for c in comps[1:]:
        full += c[len(prev):] if c.startswith(prev + ".") else "." + c
        prev = c
    return full


def graph_model(model, onnx_path):
    """A copy of model that computes exactly the exported graph: every Conv
    gets the exported (BatchNorm-folded, float32) weight and bias, and every
    BatchNorm the export folded away becomes an identity. Checked: each ONNX
    Conv maps to one Conv2d of the same shape, and no BatchNorm is both
    folded and kept."""
    m = copy.deepcopy(model)
    mods = dict(m.named_modules())
    g = onnx.load(onnx_path).graph
    inits = {t.name: numpy_helper.to_array(t) for t in g.initializer}
    for n in g.node:  # the export shares equal initializers through Identity
        if n.op_type == "Identity" and n.input[0] in inits:
            inits[n.output[0]] = inits[n.input[0]]
    kept_bn = set()
    convs = 0
    for n in g.node:
        if n.op_type == "BatchNormalization":
            kept_bn.add(_scope_to_module(n.name))
        if n.op_type != "Conv":
            continue
        path = _scope_to_module(n.name)
        conv = mods.get(path)
        if not isinstance(conv, nn.Conv2d):
            raise SystemExit(f"graph_model: ONNX node {n.name} maps to {path!r}, not a Conv2d")
        w = torch.from_numpy(inits[n.input[1]].copy())
        if w.shape != conv.weight.shape:
            raise SystemExit(f"graph_model: {n.name} weight {tuple(w.shape)} vs {path} {tuple(conv.weight.shape)}")
        conv.weight = nn.Parameter(w)
        if len(n.input) > 2 and n.input[2]:
            conv.bias = nn.Parameter(torch.from_numpy(inits[n.input[2]].copy()))
        convs += 1
    if convs != sum(isinstance(x, nn.Conv2d) for x in mods.values()):
        raise SystemExit("graph_model: not every Conv2d has an ONNX Conv node")
    for path, mod in list(m.named_modules()):
        if isinstance(mod, nn.BatchNorm2d) and path not in kept_bn:
            parent = m.get_submodule(path.rsplit(".", 1)[0]) if "." in path else m
            setattr(parent, path.rsplit(".", 1)[-1], nn.Identity())
    return m.eval()


def float64_goldens(model, capture, x, d, onnx_path):
    """Full-size only: reference results for the exported graph's own
    function, written beside the float32 goldens:

      *_f64.pb   the exported graph computed in float64 (graph_model(...)
                 .double(); the float32 weights and input are exact in
                 float64), i.e. the exact result of the function heedmap
                 evaluates, up to float64 rounding;
      *_g32.pb   PyTorch float32 computing the same exported graph.

    Why: at 224x224 and above a float32 input gradient of a ReLU network is
    not reproducible to the 1e-3 relative L2 the runtime is held to: rounding
    flips ReLU/max-pool units, whose derivatives are discontinuous
    (noise_floor.py: PyTorch float32 vs float64 differ by 1e-3 to 7e-3, and
    so do PyTorch float32 with and without the export's BatchNorm folding).
    A float32 golden of the unfolded model cannot tell a runtime bug from
    rounding. engine/networks_test.go judges our float32 result against the
    float64 truth, with gradient bounds widened to the worst of PyTorch's
    own float32 evaluations (float32_spread, returned for meta.json), and
    against the float64 gradient on the ReLU branches our own forward took
    (same_branch_grad.py) at the unwidened bounds."""
    gm = graph_model(model, onnx_path)
    results = {}
    for suffix, m, xx in (("f64", copy.deepcopy(gm).double(), x.detach().double()),
                          ("g32", gm, x.detach().clone())):
        results[suffix] = _golden_run(m, capture, xx)
        for key, arr in zip(_GOLDEN_KEYS, results[suffix]):
            tensor_pb(arr, key, os.path.join(d, f"{key}_{suffix}.pb"))
    return float32_spread(gm, capture, x, results["f64"])


_GOLDEN_KEYS = ("logits", "layer", "grad_input", "grad_layer")


def _golden_run(m, capture, xx):
    """(logits, layer value, input gradient, layer gradient) as numpy arrays."""
    xx = xx.detach().clone().requires_grad_(True)
    logits, act = capture(m, xx)
    gx, ga = torch.autograd.grad(logits[:, CLASS_INDEX].sum(), [xx, act])
    return logits.detach().numpy(), act.detach().numpy(), gx.numpy(), ga.numpy()


def _max_rel(a, b):
    """max|a-b| / max|b|, as engine/networks_test.go's maxRel."""
    a, b = a.astype(np.float64), b.astype(np.float64)
    return float(np.abs(a - b).max() / np.abs(b).max())


def _cos_rel(a, b):
    """Cosine and ||a-b||/||b||, as engine/networks_test.go's compareGrad."""
    a, b = a.astype(np.float64).ravel(), b.astype(np.float64).ravel()
    return float(a @ b / np.sqrt((a @ a) * (b @ b))), float(np.linalg.norm(a - b) / np.linalg.norm(b))


def float32_spread(gm, capture, x, truth):
    """How far PyTorch's own float32 results for the exported graph lie from
    the float64 truth, over several legitimate float32 evaluations of the
    same function. Written into meta.json ("float32_spread"); the opt-in
    full-size test in engine/networks_test.go derives its gradient bounds
    from the worst run of kind "implementation".

    kind "implementation" (same input, same weights, same graph; only the
    float32 summation order differs):
      threads2       2 intra-op threads (the *_g32.pb goldens)
      threads1       1 thread
      channels_last  NHWC memory format for weights and activations
      no_mkldnn      oneDNN disabled: PyTorch's native im2col+GEMM convolution
    kind "input" (recorded, not used for bounds): the input moved by one ulp
    per element towards +inf ("input_up") or -inf ("input_down"), i.e. a
    change below the float32 input's own resolution; it shows how sensitive
    the gradient is at x itself."""
    prev = torch.get_num_threads()
    x = x.detach()
    xnp = x.numpy()
    variants = [
        ("threads2", "implementation", 2, lambda: (gm, x, contextlib.nullcontext())),
        ("threads1", "implementation", 1, lambda: (gm, x, contextlib.nullcontext())),
        ("channels_last", "implementation", 2, lambda: (
            copy.deepcopy(gm).to(memory_format=torch.channels_last),
            x.contiguous(memory_format=torch.channels_last), contextlib.nullcontext())),
        ("no_mkldnn", "implementation", 2, lambda: (gm, x, torch.backends.mkldnn.flags(enabled=False))),
        ("input_up", "input", 2, lambda: (
            gm, torch.from_numpy(np.nextafter(xnp, np.float32(np.inf))), contextlib.nullcontext())),
        ("input_down", "input", 2, lambda: (
            gm, torch.from_numpy(np.nextafter(xnp, np.float32(-np.inf))), contextlib.nullcontext())),
    ]
    runs = []
    try:
        for name, kind, threads, make in variants:
            torch.set_num_threads(threads)
            m, xx, ctx = make()
            with ctx:
                got = _golden_run(m, capture, xx)
            run = {"name": name, "kind": kind, "threads": threads,
                   "logits_max_rel": _max_rel(got[0], truth[0]),
                   "layer_max_rel": _max_rel(got[1], truth[1])}
            for key, g, t in zip(_GOLDEN_KEYS[2:], got[2:], truth[2:]):
                cos, rel = _cos_rel(g, t)
                run[key] = {"cosine": cos, "rel_l2": rel}
            runs.append(run)
            print(f"  float32 {name:14s} vs float64: input grad rel L2 {run['grad_input']['rel_l2']:.2e} "
                  f"cos {run['grad_input']['cosine']:.7f}; layer grad rel L2 {run['grad_layer']['rel_l2']:.2e}; "
                  f"logits {run['logits_max_rel']:.1e}", flush=True)
    finally:
        torch.set_num_threads(prev)
    return {"reference": "exported graph in float64 (*_f64.pb)", "runs": runs}


def export(name, builder, outdir, seed, full=False):
    torch.manual_seed(seed)
    gen = torch.Generator().manual_seed(seed)
    model, size, capture = builder()
    randomise(model, size, gen)
    # Parameters keep requires_grad=True: it also keeps PyTorch's fused
    # attention fast path (no ONNX export) out of ViT's traced graph.

    d = os.path.join(outdir, name)
    os.makedirs(d, exist_ok=True)
    path = os.path.join(d, "model.onnx")
    dummy = torch.randn(1, 3, size, size, generator=gen)
    torch.onnx.export(model, dummy, path, opset_version=OPSET, do_constant_folding=True,
                      input_names=["input"], output_names=["logits"],
                      dynamic_axes={"input": {0: "batch"}, "logits": {0: "batch"}})

    m = onnx.load(path)
    onnx.checker.check_model(m)
    layer = onnx_layer_name(m.graph, name)
    inferred = onnx.shape_inference.infer_shapes(m)
    produced = {o for n in m.graph.node for o in n.output}
    if layer not in produced:
        raise SystemExit(f"{name}: layer {layer!r} is not a node output")

    x = torch.randn(BATCH, 3, size, size, generator=gen).requires_grad_(True)
    logits, act = capture(model, x)
    # Same forward as the export (checks the capture replays the model).
    with torch.no_grad():
        ref = model(x)
    if not torch.allclose(ref, logits, rtol=1e-5, atol=1e-6):
        raise SystemExit(f"{name}: capture forward differs from model forward")
    score = logits[:, CLASS_INDEX].sum()
    gx, ga = torch.autograd.grad(score, [x, act])

    # The declared ONNX shape of the layer must match the captured tensor.
    for vi in inferred.graph.value_info:
        if vi.name == layer and vi.type.tensor_type.HasField("shape"):
            dims = [dd.dim_value if dd.HasField("dim_value") else None for dd in vi.type.tensor_type.shape.dim]
            want = list(act.shape)
            if len(dims) != len(want) or any(a is not None and a != b for a, b in zip(dims[1:], want[1:])):
                raise SystemExit(f"{name}: layer {layer} has ONNX shape {dims}, captured {want}")

    tensor_pb(x.detach().numpy(), "input", os.path.join(d, "input.pb"))
    tensor_pb(logits.detach().numpy(), "logits", os.path.join(d, "logits.pb"))
    tensor_pb(gx.numpy(), "grad_input", os.path.join(d, "grad_input.pb"))
    tensor_pb(act.detach().numpy(), layer, os.path.join(d, "layer.pb"))
    tensor_pb(ga.numpy(), "grad_layer", os.path.join(d, "grad_layer.pb"))
    spread = float64_goldens(model, capture, x, d, path) if full else None
    meta = {
        "name": name,
        "input": "input",
        "output": "logits",
        "layer": layer,
        "class": CLASS_INDEX,
        "batch": BATCH,
        "image_size": size,
        "seed": seed,
        "opset": OPSET,
        "params": int(sum(p.numel() for p in model.parameters())),
        "torch": torch.__version__,
        "torchvision": torchvision.__version__,
        "onnx": onnx.__version__,
        "float64_goldens": full,
        "script": "testdata/reference/export_nets.py",
    }
    if spread is not None:
        meta["float32_spread"] = spread
    with open(os.path.join(d, "meta.json"), "w") as f:
        json.dump(meta, f, indent=1)
        f.write("\n")
    print(f"{name}: {meta['params']} params, input {size}x{size}, layer {layer} {list(act.shape)}, "
          f"logits[0,:3] {logits[0, :3].detach().numpy()}", flush=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--full", action="store_true", help="full-size torchvision architectures")
    ap.add_argument("--out", help="output directory (default testdata/nets; required with --full)")
    ap.add_argument("nets", nargs="*", help="subset of: " + " ".join(NETS))
    args = ap.parse_args()
    torch.set_num_threads(2)
    here = os.path.dirname(os.path.abspath(__file__))
    out = args.out or os.path.join(here, "..", "nets")
    if args.full and not args.out:
        raise SystemExit("--full needs --out DIR (full-size exports are not committed)")
    names = args.nets or list(NETS)
    for i, name in enumerate(NETS):
        if name not in names:
            continue
        small, full = NETS[name]
        export(name, full if args.full else small, out, seed=1000 + i, full=args.full)


if __name__ == "__main__":
    sys.exit(main())
