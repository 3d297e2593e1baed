# Golden for explain.Upsample: PyTorch bilinear interpolation with
# align_corners=False (half-pixel centres, edge clamping).
# Run: /usr/bin/python3 explain/testdata/upsample_golden.py > explain/testdata/upsample_golden.txt
import torch
import torch.nn.functional as F

torch.manual_seed(0)
ih, iw, oh, ow = 3, 5, 11, 8
x = torch.rand(1, 1, ih, iw)
y = F.interpolate(x, size=(oh, ow), mode="bilinear", align_corners=False)
print(ih, iw, oh, ow)
print(" ".join(repr(float(v)) for v in x.flatten()))
print(" ".join(repr(float(v)) for v in y.flatten()))
