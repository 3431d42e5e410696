"""Regenerate the invented demo data (examples/demo_data) and fit_specs/demo.yaml.

The data come from plateaufit.demo with its fixed seed, so running this again
reproduces the committed files byte for byte (with the same HDF5 library for
vector.h5). Usage::

    python examples/make_demo_data.py            # rewrite the files
    python examples/make_demo_data.py --check    # only compare; exit 1 on a difference
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from plateaufit.atomic import write_text
from plateaufit.demo import DEMO_SEED, demo_files, demo_spec_text, generate_demo_data

HERE = Path(__file__).resolve().parent
DATA_DIR = HERE / "demo_data"
SPEC = HERE.parent / "fit_specs" / "demo.yaml"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true",
                        help="compare with the committed files instead of writing them")
    parser.add_argument("--seed", type=int, default=DEMO_SEED, help="random seed")
    args = parser.parse_args(argv)
    spec_text = demo_spec_text()
    if args.check:
        different = [name for name, data in demo_files(args.seed).items()
                     if not (DATA_DIR / name).is_file() or (DATA_DIR / name).read_bytes() != data]
        if not SPEC.is_file() or SPEC.read_text(encoding="utf-8") != spec_text:
            different.append(str(SPEC))
        for name in different:
            print(f"differs: {name}")
        return 1 if different else 0
    info = generate_demo_data(DATA_DIR, seed=args.seed)
    write_text(SPEC, spec_text)
    for path in info["files"].values():
        print(f"wrote {path} ({path.stat().st_size} bytes)")
    print(f"wrote {SPEC}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
