"""Regenerate the invented demo fleet (see README.md in this folder).

    python scenarios/generate.py --out demo-output/scenario --units 2000 --seed 7
    python scenarios/generate.py --out /tmp/linear --units 400 --effects linear

Thin wrapper around :func:`wearcast.scenario.generate_scenario`; prints the
files written, the counts and how long it took.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from wearcast.scenario import generate_scenario


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the invented Vennmoor Water Board fleet.")
    parser.add_argument("--out", type=Path, default=Path("demo-output/scenario"), help="folder to write into")
    parser.add_argument("--units", type=int, default=2000, help="number of unit positions")
    parser.add_argument("--seed", type=int, default=7, help="seed (same seed, same files)")
    parser.add_argument("--effects", choices=("nonlinear", "linear", "none"), default="nonlinear",
                        help="shape of the true covariate effects")
    args = parser.parse_args(argv)
    start = time.perf_counter()
    files = generate_scenario(args.out, n_units=args.units, seed=args.seed, effects=args.effects)
    elapsed = time.perf_counter() - start
    for name, path in files.as_dict().items():
        print(f"{name:<9} {path}")
    counts = json.loads(files.manifest.read_text(encoding="utf-8"))["counts"]
    print("counts   ", ", ".join(f"{k} {v}" for k, v in counts.items()))
    print(f"written in {elapsed:.1f} s")


if __name__ == "__main__":
    main()
