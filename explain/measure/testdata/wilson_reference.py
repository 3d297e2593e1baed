#!/usr/bin/python3
# Independent Wilson score intervals for stats_test.go (run with
# /usr/bin/python3; plain formula, Wilson 1927, since Debian's scipy and
# statsmodels are not installed here). The cases are Newcombe, Statistics in
# Medicine 1998;17:857-872, Table I examples as recalled (value from memory);
# this script confirmed them to 4 decimals before the test relied on them.
import math
z = 1.959963984540054
for k, n in [(81, 263), (15, 148), (0, 20), (1, 29), (29, 29)]:
    p = k / n
    d = 1 + z * z / n
    c = (p + z * z / (2 * n)) / d
    h = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / d
    print(f"{k}/{n}: {max(c - h, 0):.6f} {min(c + h, 1):.6f}")
