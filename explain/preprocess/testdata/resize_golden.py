# Golden for explain/preprocess resizing: PIL's BILINEAR resize (what
# torchvision's Resize applies to PIL images), for a stretch (60x45 -> 32x24)
# and a shorter-side resize + centre crop (60x45 -> 40x30 -> crop 30x30).
# Run from the repository root:
#   /usr/bin/python3 explain/preprocess/testdata/resize_golden.py
# Writes pattern.png (the input) and resize_golden.txt (8-bit outputs).
import os
from PIL import Image

here = os.path.dirname(os.path.abspath(__file__))
w, h = 60, 45
img = Image.new("RGB", (w, h))
px = img.load()
for y in range(h):
    for x in range(w):
        # smooth gradients plus a sharp-edged block, to exercise the filter
        r = (x * 4 + y * 2) % 256
        g = (x * y) % 256
        b = 230 if 20 <= x < 35 and 10 <= y < 30 else 20
        px[x, y] = (r, g, b)
img.save(os.path.join(here, "pattern.png"))

def dump(f, name, im):
    f.write("%s %d %d\n" % (name, im.size[0], im.size[1]))
    f.write(" ".join(str(v) for p in im.getdata() for v in p) + "\n")

with open(os.path.join(here, "resize_golden.txt"), "w") as f:
    dump(f, "stretch", img.resize((32, 24), Image.BILINEAR))
    dump(f, "crop", img.resize((40, 30), Image.BILINEAR).crop((5, 0, 35, 30)))
