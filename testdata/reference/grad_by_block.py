#!/usr/bin/python3
"""Where does a full-size net's float32 input-gradient error arise?

For one full-size net of export_nets.py (same seed, weights and input) and
its exported model.onnx, computes the gradient of sum_batch logit[class]
with respect to the input and to named block outputs, on the exported
graph's own function (export_nets.graph_model), in float64 (the truth) and
in float32 three ways: 2 threads, 1 thread, and with the input moved by one
ulp per element (PyTorch's own float32 variability). Prints the relative L2
error of each against float64. If GRADDIR holds raw little-endian float32
files aa.f32, ab.f32, ... (heedmap's Pass.Backward gradients for the same
names, in order), their error is printed too.

    /usr/bin/python3 testdata/reference/grad_by_block.py resnet18 DIR/resnet18/model.onnx GRADDIR \
        input /layer2/layer2.1/relu_1/Relu_output_0@layer2.1 /layer3/layer3.1/relu_1/Relu_output_0@layer3.1

Each name after "input" is ONNX_TENSOR@torch_module (the module whose
output that tensor is).
"""
import copy, os, sys
import numpy as np
import torch
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import export_nets as E
name, onnx_path, gdir = sys.argv[1], sys.argv[2], sys.argv[3]
names = sys.argv[4:]
torch.set_num_threads(2)
seed = 1000 + list(E.NETS).index(name)
torch.manual_seed(seed); gen = torch.Generator().manual_seed(seed)
model, size, capture = E.NETS[name][1]()
E.randomise(model, size, gen)
torch.randn(1, 3, size, size, generator=gen)
x = torch.randn(E.BATCH, 3, size, size, generator=gen)
gm = E.graph_model(model, onnx_path)
def grads(m, xx):
    mods = dict(m.named_modules()); box = {}; hs = []
    for n in names[1:]:
        mn = n.split("@")[1]
        def hook(mm, i, o, n=n):
            o.retain_grad()
            box[n] = o
        hs.append(mods[mn].register_forward_hook(hook))
    xx = xx.clone().requires_grad_(True)
    m(xx)[:, E.CLASS_INDEX].sum().backward()
    for h in hs: h.remove()
    return [xx.grad.double()] + [box[n].grad.double() for n in names[1:]]
g64 = grads(copy.deepcopy(gm).double(), x.double())
g32 = grads(gm, x)
torch.set_num_threads(1)
g32b = grads(gm, x)
# one-ulp input perturbation
xp = x + x.abs() * 2**-23 * torch.sign(torch.randn(x.shape, generator=gen))
g32c = grads(gm, xp)
def rel(a, b): return (a - b).norm().item() / b.norm().item()
for i, n in enumerate(names):
    p = os.path.join(gdir, f"{chr(97+i//26)}{chr(97+i%26)}.f32")
    ours = torch.from_numpy(np.fromfile(p, dtype=np.float32)).double().reshape(g64[i].shape) if os.path.exists(p) else None
    o = f"{rel(ours, g64[i]):.2e}" if ours is not None else "-"
    print(f"{n:42s} relL2 vs f64 graph: ours {o}  torch32(2 threads) {rel(g32[i], g64[i]):.2e}  torch32(1 thread) {rel(g32b[i], g64[i]):.2e}  torch32(input +-1ulp) {rel(g32c[i], g64[i]):.2e}", flush=True)
