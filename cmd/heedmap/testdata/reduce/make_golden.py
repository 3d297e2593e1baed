# Golden files for TestBoxReduceMatchesPillow (cmd/heedmap/reduce_test.go):
# Pillow's Image.reduce(k) is the box rule heedmap states for pictures over
# the memory cap (each output pixel the mean of a k×k block, edge blocks
# averaging the pixels they have, output size rounded up).
#
#   /usr/bin/python3 cmd/heedmap/testdata/reduce/make_golden.py
import os
from PIL import Image

here = os.path.dirname(os.path.abspath(__file__))
w, h = 11, 7
img = Image.new("RGB", (w, h))
img.putdata([((x * 37 + y * 11) % 256, (x * x * 5 + y * 29) % 256, (x * y * 13 + 7) % 256)
             for y in range(h) for x in range(w)])
img.save(os.path.join(here, "src.png"))
for k in (2, 3, 4):
    img.reduce(k).save(os.path.join(here, "reduce%d.png" % k))
