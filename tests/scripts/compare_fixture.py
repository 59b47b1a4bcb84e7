#!/usr/bin/env python3
"""Compare a committed reference fixture with a fresh run of its script.

Used by .ci/run. Two regenerations on one machine must agree byte for byte (the script is
deterministic; .ci/run diffs them directly). A committed fixture may come from another
machine, where numpy's and scikit-learn's vectorized math (exp, log, pow, summation order
of SIMD kernels) can differ in the last bits of a float, and an iterative solver started
from such a value stops at a slightly different point within its tolerance (seen:
scikit-learn's lbfgs coefficients in shift_reference.json moved by a relative 3e-9). So here
the files are split into tokens: numbers must agree to a relative tolerance of 1e-6
(absolute 1e-9 near zero) — the precision the Rust tests ask of those references — and every
other token exactly. A library that now says something else differs far more than that.

Usage: compare_fixture.py COMMITTED FRESH
Exit 0 when they agree (prints "exactly" or "within 1e-6"), 1 otherwise with the first
differences.
"""

import math
import re
import sys

NUMBER = re.compile(r"[-+]?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][-+]?\d+)?|[-+]?(?:inf|nan)\b")
TOKEN = re.compile(NUMBER.pattern + r"|\s+|.", re.DOTALL)
REL, ABS = 1e-6, 1e-9


def tokens(text):
    return [t for t in TOKEN.findall(text) if not t.isspace()]


def same(a, b):
    if a == b:
        return True
    if NUMBER.fullmatch(a) and NUMBER.fullmatch(b):
        x, y = float(a), float(b)
        if math.isnan(x) and math.isnan(y):
            return True
        return math.isclose(x, y, rel_tol=REL, abs_tol=ABS)
    return False


def main():
    committed, fresh = sys.argv[1], sys.argv[2]
    with open(committed, encoding="utf-8") as f:
        a_text = f.read()
    with open(fresh, encoding="utf-8") as f:
        b_text = f.read()
    if a_text == b_text:
        print(f"reproduced {committed} exactly")
        return 0
    a, b = tokens(a_text), tokens(b_text)
    bad = []
    if len(a) != len(b):
        bad.append(f"token count {len(a)} vs {len(b)}")
    for i, (x, y) in enumerate(zip(a, b)):
        if not same(x, y):
            bad.append(f"token {i}: {x!r} vs {y!r}")
            if len(bad) >= 10:
                break
    if bad:
        print(f"{committed} differs from a fresh run of its script:", file=sys.stderr)
        for line in bad:
            print("  " + line, file=sys.stderr)
        return 1
    print(f"reproduced {committed} within a relative 1e-6 (float differences of another CPU only)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
