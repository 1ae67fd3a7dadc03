#!/usr/bin/env python3
"""Regenerates the reference fixtures in tests/fixtures with the reference libraries
(numpy, scipy, nibabel). CI re-runs this script and fails when the output drifts.
Every fixture is deterministic: fixed seeds, no timestamps."""
import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "..", "tests", "fixtures")


def main():
    os.makedirs(OUT, exist_ok=True)
    import fixtures  # noqa: F401  (scripts/fixtures.py: one function per fixture)
    for name in sorted(n for n in dir(fixtures) if n.startswith("make_")):
        getattr(fixtures, name)(OUT)
        print(f"fixture: {name[5:]}")


if __name__ == "__main__":
    sys.path.insert(0, HERE)
    main()
