# Golden for explain/preprocess's CMYK rule on a real CMYK JPEG, written by
# PIL (Debian python3-pil 9.4; PIL stores CMYK JPEGs Adobe-style, inverted,
# with an APP14 "Adobe" marker). Four flat 16x16 blocks of known CMYK inks,
# quality 100 without chroma subsampling so that block centres decode close
# to the written values. cmyk_golden.txt lists, per block, the centre pixel
# and the written C M Y K (0-255).
# Run from the repository root:
#   /usr/bin/python3 explain/preprocess/testdata/cmyk_golden.py
import os
from PIL import Image

here = os.path.dirname(os.path.abspath(__file__))
inks = [(0, 0, 0, 0), (255, 0, 0, 0), (20, 200, 40, 60), (100, 30, 180, 10)]
img = Image.new("CMYK", (32, 32))
px = img.load()
for i, ink in enumerate(inks):
    x0, y0 = (i % 2) * 16, (i // 2) * 16
    for y in range(y0, y0 + 16):
        for x in range(x0, x0 + 16):
            px[x, y] = ink
img.save(os.path.join(here, "cmyk.jpg"), quality=100, subsampling=0)
with open(os.path.join(here, "cmyk_golden.txt"), "w") as f:
    for i, ink in enumerate(inks):
        x0, y0 = (i % 2) * 16, (i // 2) * 16
        f.write(f"{x0 + 8} {y0 + 8} {ink[0]} {ink[1]} {ink[2]} {ink[3]}\n")
