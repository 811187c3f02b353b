"""Write the invented demo town of Quennet Vale (people, contacts, example policy) to a folder.

The generator itself lives in ``aggpub/demo.py`` so that ``aggpub demo`` works from an
installed package; this script is the stand-alone entry point for the walkthrough.

Usage::

    .venv/bin/python examples/make_town.py town-data [--people 30000] [--seed 20261201]
"""

from __future__ import annotations

import argparse

from aggpub.demo import TOWN_NAME, write_demo_inputs


def main() -> None:
    parser = argparse.ArgumentParser(description=f"Write the invented town of {TOWN_NAME} to a folder.")
    parser.add_argument("folder")
    parser.add_argument("--people", type=int, default=30_000)
    parser.add_argument("--seed", type=int, default=20261201, help="seed of the invented town (not of the noise)")
    args = parser.parse_args()
    paths = write_demo_inputs(args.folder, n_people=args.people, seed=args.seed)
    for kind, path in paths.items():
        print(f"{kind:7s} {path}")


if __name__ == "__main__":
    main()
