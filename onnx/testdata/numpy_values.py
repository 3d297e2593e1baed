#!/usr/bin/python3
"""Independent reference values for heedmap's ONNX decoder tests.

Reads a few tensors from the ONNX conformance data (Debian libonnx-testdata)
with ONNX's own Python decoder (onnx.numpy_helper.to_array, Debian
python3-onnx 1.12) and writes their dtype, shape, sum and first values to
numpy_values.json beside this script. decode_values_test.go compares the Go
decoder against that file.

Rerun: /usr/bin/python3 onnx/testdata/numpy_values.py
"""
import json
import os

import numpy as np
import onnx
from onnx import numpy_helper

ROOT = "/usr/share/libonnx-testdata/data"

PB = [  # one serialized TensorProto per element type / storage
    "node/test_abs/test_data_set_0/input_0.pb",  # float, raw_data
    "node/test_add_uint8/test_data_set_0/input_0.pb",
    "node/test_clip_default_int8_inbounds/test_data_set_0/input_0.pb",
    "node/test_bitshift_left_uint16/test_data_set_0/input_0.pb",
    "node/test_max_int16/test_data_set_0/input_0.pb",
    "node/test_basic_convinteger/test_data_set_0/output_0.pb",  # int32
    "node/test_adagrad/test_data_set_0/input_1.pb",  # int64 scalar
    "node/test_and2d/test_data_set_0/input_0.pb",  # bool
    "node/test_cast_FLOAT16_to_DOUBLE/test_data_set_0/input_0.pb",  # float16
    "node/test_bernoulli/test_data_set_0/input_0.pb",  # double
    "node/test_bitshift_left_uint32/test_data_set_0/input_0.pb",
    "node/test_bitshift_left_uint64/test_data_set_0/input_0.pb",
    "pytorch-converted/test_Conv2d/test_data_set_0/input_0.pb",
]

MODELS = [  # (model, what): initializers by name, Constant-like attributes by node index
    ("pytorch-converted/test_Conv2d/model.onnx", "initializers"),
    ("pytorch-converted/test_BatchNorm1d_3d_input_eval/model.onnx", "initializers"),
    ("node/test_blackmanwindow_expanded/model.onnx", "attrs"),  # float_data
    ("node/test_constantofshape_int_zeros/model.onnx", "attrs"),  # int32_data
    ("node/test_layer_normalization_2d_axis0_expanded/model.onnx", "attrs"),  # int64_data
    ("pytorch-operator/test_operator_addconstant/model.onnx", "attrs"),  # double raw
]


def entry(arr, **where):
    flat = np.asarray(arr).reshape(-1)
    return dict(where,
                dtype=str(arr.dtype),
                shape=list(arr.shape),
                sum=float(flat.astype(np.float64).sum()),
                first=[float(v) for v in flat[:8].astype(np.float64)])


def main():
    out = []
    for rel in PB:
        t = onnx.TensorProto()
        with open(os.path.join(ROOT, rel), "rb") as f:
            t.ParseFromString(f.read())
        out.append(entry(numpy_helper.to_array(t), file=rel, tensor=t.name))
    for rel, what in MODELS:
        m = onnx.load(os.path.join(ROOT, rel))
        if what == "initializers":
            for t in m.graph.initializer:
                out.append(entry(numpy_helper.to_array(t), file=rel, initializer=t.name))
        else:
            for i, n in enumerate(m.graph.node):
                for a in n.attribute:
                    if a.type == onnx.AttributeProto.TENSOR:
                        out.append(entry(numpy_helper.to_array(a.t), file=rel, node=i, attr=a.name))
    here = os.path.dirname(os.path.abspath(__file__))
    with open(os.path.join(here, "numpy_values.json"), "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    print(len(out), "entries")


if __name__ == "__main__":
    main()
