#!/usr/bin/env python3
"""Checks that regenerated fixtures match the committed ones.

For each JSON file named on the command line it compares the working copy
with the committed version (git show HEAD:PATH): the same structure and
strings, and numbers equal to within 1e-12 relative (1e-300 absolute).
Reference libraries can differ in the last bit or two of a float between
machines (summation order in numpy), which a byte comparison would call a
change; 1e-12 is far below the tolerances the Go tests use (1e-9).
Any other file must be byte-identical. Exits 1 on the first difference.
"""
import json
import math
import subprocess
import sys


def same(a, b, path):
    if isinstance(a, bool) or isinstance(b, bool):
        return a == b or f"{path}: {a!r} != {b!r}"
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        if a == b or math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-300):
            return True
        return f"{path}: {a!r} != {b!r}"
    if type(a) is not type(b):
        return f"{path}: {type(a).__name__} != {type(b).__name__}"
    if isinstance(a, dict):
        if a.keys() != b.keys():
            return f"{path}: keys {sorted(a)} != {sorted(b)}"
        for k in a:
            r = same(a[k], b[k], f"{path}.{k}")
            if r is not True:
                return r
        return True
    if isinstance(a, list):
        if len(a) != len(b):
            return f"{path}: {len(a)} items != {len(b)}"
        for i, (x, y) in enumerate(zip(a, b)):
            r = same(x, y, f"{path}[{i}]")
            if r is not True:
                return r
        return True
    return a == b or f"{path}: {a!r} != {b!r}"


def main():
    bad = False
    for p in sys.argv[1:]:
        old = subprocess.run(["git", "show", "HEAD:" + p], check=True, capture_output=True).stdout
        with open(p, "rb") as f:
            new = f.read()
        if old == new:
            continue
        if p.endswith(".json"):
            r = same(json.loads(old), json.loads(new), p)
            if r is True:
                print(f"{p}: differs only in the last bits of some floats (within 1e-12)")
                continue
        else:
            r = f"{p}: bytes differ"
        print("differs:", r)
        bad = True
    sys.exit(1 if bad else 0)


if __name__ == "__main__":
    main()
