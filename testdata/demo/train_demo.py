#!/usr/bin/python3
"""Train heedmap's two demo classifiers on synthetic scenes and export ONNX.

Run from the repository root with Debian's torch (the python3 on PATH may not
see it):

    /usr/bin/python3 testdata/demo/train_demo.py [--work /tmp/heedmap-demo]

It calls the Go generator (go run ./synth/cmd/synthgen) to write five
datasets of 64x64 scenes, trains

  shortcut.onnx  on data where a ruler appears in 98 % of class-1 scenes and
                 2 % of class-0 scenes, so the ruler predicts the label better
                 than the lesion does;
  clean.onnx     on data where the ruler appears in half the scenes of either
                 class;

and evaluates both on test sets that share lesions (same seeds) but place the
ruler with the class ("aligned"), against it ("flipped") or never ("none").
The synthetic class rule is invented: class 1 lesions have a more irregular
border and more colour blotches; the classes overlap, so about 9 % of scenes
are ambiguous from the lesion alone.

Model input: "input" float32 [N,3,64,64], RGB, x = (pixel/255 - 0.5) / 0.25.
Model output: "logits" float32 [N,2]; index 0 benign-like, 1 malignant-like.
Ops: Conv, BatchNormalization (folded into Conv by the exporter in eval mode),
Relu, MaxPool, GlobalAveragePool, Flatten, Gemm.
"""
import argparse
import csv
import os
import shutil
import subprocess
import sys
import time

import numpy as np
import torch
import torch.nn as nn
from PIL import Image

torch.set_num_threads(2)
HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.abspath(os.path.join(HERE, "..", ".."))
SIZE = 64
MEAN, STD = 0.5, 0.25
OTHERS = "ink=0.25,hair=0.25,bubbles=0.25,dark_corners=0.25"

# name -> (seed, count, ruler rates class0:class1)
SETS = {
    "train_shortcut": (1001, 1600, "0.02:0.98"),
    "train_clean": (1001, 1600, "0.5:0.5"),
    "test_aligned": (2002, 400, "0:1"),
    "test_flipped": (2002, 400, "1:0"),
    "test_none": (2002, 400, "0:0"),
}


def generate(work):
    for name, (seed, n, ruler) in SETS.items():
        out = os.path.join(work, name)
        if os.path.exists(os.path.join(out, "manifest.csv")):
            continue
        cmd = ["go", "run", "./synth/cmd/synthgen", "-out", out, "-n", str(n),
               "-size", str(SIZE), "-seed", str(seed),
               "-rates", "ruler=%s,%s" % (ruler, OTHERS)]
        print(" ".join(cmd), flush=True)
        subprocess.run(cmd, cwd=ROOT, check=True)


def load(work, name):
    d = os.path.join(work, name)
    xs, ys = [], []
    with open(os.path.join(d, "manifest.csv")) as f:
        for row in csv.DictReader(f):
            im = np.asarray(Image.open(os.path.join(d, row["image"])).convert("RGB"), dtype=np.float32)
            xs.append(((im / 255.0 - MEAN) / STD).transpose(2, 0, 1))
            ys.append(int(row["label"]))
    return torch.from_numpy(np.stack(xs)), torch.tensor(ys)


def block(cin, cout):
    return [nn.Conv2d(cin, cout, 3, padding=1, bias=False), nn.BatchNorm2d(cout), nn.ReLU()]


class DemoNet(nn.Module):
    # 16-32-48-64 channels: 47 k parameters, about 24 MFLOP per 64x64 image.
    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(
            *block(3, 16), nn.MaxPool2d(2),
            *block(16, 32), nn.MaxPool2d(2),
            *block(32, 48), nn.MaxPool2d(2),
            *block(48, 64),
        )
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(64, 2)

    def forward(self, x):
        return self.fc(torch.flatten(self.pool(self.features(x)), 1))


def train(x, y, seed, epochs):
    torch.manual_seed(seed)
    net = DemoNet()
    opt = torch.optim.Adam(net.parameters(), lr=3e-3)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, epochs)
    g = torch.Generator().manual_seed(seed)
    for ep in range(epochs):
        net.train()
        perm = torch.randperm(len(x), generator=g)
        tot = 0.0
        for i in range(0, len(x), 64):
            idx = perm[i:i + 64]
            xb = x[idx]
            if torch.rand(1, generator=g).item() < 0.5:  # flips keep the ruler a ruler
                xb = xb.flip(3)
            loss = nn.functional.cross_entropy(net(xb), y[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
            tot += loss.item() * len(idx)
        sched.step()
        print("  epoch %d loss %.4f" % (ep + 1, tot / len(x)), flush=True)
    net.eval()
    return net


def accuracy(net, x, y):
    with torch.no_grad():
        return (net(x).argmax(1) == y).float().mean().item()


def export(net, path):
    dummy = torch.zeros(1, 3, SIZE, SIZE)
    torch.onnx.export(net, dummy, path, opset_version=13, input_names=["input"],
                      output_names=["logits"],
                      dynamic_axes={"input": {0: "N"}, "logits": {0: "N"}},
                      do_constant_folding=True)
    import onnx
    m = onnx.load(path)
    onnx.checker.check_model(m)
    return sorted({n.op_type for n in m.graph.node})


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--work", default="/tmp/heedmap-demo")
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--out", default=HERE)
    a = ap.parse_args()
    t0 = time.time()
    generate(a.work)
    data = {n: load(a.work, n) for n in SETS}
    rows = []
    for name, train_set, seed in (("shortcut", "train_shortcut", 11), ("clean", "train_clean", 12)):
        print("training %s on %s (torch seed %d)" % (name, train_set, seed), flush=True)
        net = train(*data[train_set], seed, a.epochs)
        accs = [accuracy(net, *data[t]) for t in ("test_aligned", "test_flipped", "test_none")]
        rows.append((name, accs))
        ops = export(net, os.path.join(a.out, name + ".onnx"))
        if a.out == HERE:
            # `heedmap demo` embeds both models (go:embed cannot reach
            # testdata/); TestDemoModelMatchesTestdata fails if they drift.
            shutil.copyfile(os.path.join(a.out, name + ".onnx"),
                            os.path.join(ROOT, "cmd", "heedmap", "demo_%s.onnx" % name))
        nparam = sum(p.numel() for p in net.parameters())
        print("%s: %d parameters, ops %s" % (name, nparam, ",".join(ops)))
    print("\naccuracy on 400 test scenes (same lesions, ruler placement varies)")
    print("| model | ruler with class 1 (aligned) | ruler with class 0 (flipped) | no ruler |")
    print("|---|---|---|---|")
    for name, accs in rows:
        print("| %s | %.3f | %.3f | %.3f |" % (name, *accs))
    print("\ntotal %.0f s" % (time.time() - t0))
    short, clean = rows[0][1], rows[1][1]
    ok = short[1] < short[0] - 0.25 and abs(clean[1] - clean[0]) < 0.08
    print("check (shortcut collapses when flipped, clean does not):", "PASS" if ok else "FAIL")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
