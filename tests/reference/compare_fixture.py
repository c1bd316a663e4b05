"""Compares a freshly generated fixture with the committed one: same structure, same strings,
numbers equal to 1e-12 relative (reference libraries may differ in the last bits across builds).
Usage: python3 compare_fixture.py COMMITTED.json FRESH.json   (exit 1 on any difference)"""
import json
import math
import sys


def walk(a, b, path, errors):
    if isinstance(a, dict) and isinstance(b, dict):
        if path == "$.versions":
            return
        if set(a) != set(b):
            errors.append(f"{path}: keys differ: {sorted(set(a) ^ set(b))}")
        for k in set(a) & set(b):
            walk(a[k], b[k], f"{path}.{k}", errors)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            errors.append(f"{path}: lengths {len(a)} vs {len(b)}")
        for i, (x, y) in enumerate(zip(a, b)):
            walk(x, y, f"{path}[{i}]", errors)
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if not math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-300):
            errors.append(f"{path}: {a!r} vs {b!r}")
    elif a != b:
        errors.append(f"{path}: {a!r} vs {b!r}")


committed, fresh = (json.load(open(p)) for p in sys.argv[1:3])
errs = []
walk(committed, fresh, "$", errs)
for e in errs[:20]:
    print("fixture differs:", e)
print(f"fixture check: {len(errs)} differences")
sys.exit(1 if errs else 0)
