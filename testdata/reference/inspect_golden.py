#!/usr/bin/python3
"""Golden model summaries for `heedmap inspect`, computed with the onnx
Python package (Debian python3-onnx), independently of heedmap's decoder.

For every compact reference net in testdata/nets (made by export_nets.py) it
records what `heedmap inspect` must report: graph inputs that are not
initializers and graph outputs with their element type and dims (a symbolic
dim by its name), the opset imports, the op-type histogram and the number
of initializer elements (the parameter count of the exported graph: after
BatchNorm folding this differs from PyTorch's parameter count, which
meta.json keeps as "params"). Written to testdata/reference/inspect_golden.json
and read by cmd/heedmap/inspect_test.go.

Rerun from the repository root:
    /usr/bin/python3 testdata/reference/inspect_golden.py
"""
import collections
import glob
import json
import os

import numpy as np
import onnx

HERE = os.path.dirname(os.path.abspath(__file__))
NETS = os.path.join(HERE, "..", "nets")


def dims(vi):
    out = []
    for d in vi.type.tensor_type.shape.dim:
        if d.HasField("dim_param"):
            out.append(d.dim_param)
        elif d.HasField("dim_value"):
            out.append(str(d.dim_value))
        else:
            out.append("?")
    return out


def summary(path):
    m = onnx.load(path)
    g = m.graph
    inits = {t.name for t in g.initializer}
    elem = lambda vi: onnx.mapping.TENSOR_TYPE_TO_NP_TYPE[vi.type.tensor_type.elem_type].name
    return {
        "inputs": [{"name": vi.name, "dtype": elem(vi), "dims": dims(vi)} for vi in g.input if vi.name not in inits],
        "outputs": [{"name": vi.name, "dtype": elem(vi), "dims": dims(vi)} for vi in g.output],
        "opsets": {(o.domain or "ai.onnx"): o.version for o in m.opset_import},
        "ops": dict(collections.Counter(n.op_type for n in g.node)),
        "parameters": int(sum(int(np.prod(t.dims)) for t in g.initializer)),
    }


def main():
    out = {}
    for p in sorted(glob.glob(os.path.join(NETS, "*", "model.onnx"))):
        out[os.path.basename(os.path.dirname(p))] = summary(p)
    out["_generator"] = "testdata/reference/inspect_golden.py with onnx " + onnx.__version__
    with open(os.path.join(HERE, "inspect_golden.json"), "w") as f:
        json.dump(out, f, indent=1, sort_keys=True)
        f.write("\n")


if __name__ == "__main__":
    main()
