"""Command line: ``python -m mcexact demo`` runs the exact analysis of the demo data."""

from __future__ import annotations

import argparse
import sys

from mcexact._exceptions import McexactError


def _demo(args) -> int:
    from mcexact.demo import DEMOS, load_demo
    from mcexact.fit import fit

    file, formula, options = DEMOS[args.name]
    data = load_demo(args.name)
    print(f"demo {args.name!r}: {formula!r} with {options} on {len(data)} rows ({file})\n")
    result = fit(data, formula, alpha=args.alpha, **options)
    print(result.summary())
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            fh.write(result.to_json(indent=2))
    return 0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="mcexact", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    demo = sub.add_parser("demo", help="exact analysis of an invented demo data set",
                          description="Run the whole analysis on invented demo data, e.g. "
                                      "'python -m mcexact demo'.")
    demo.add_argument("name", nargs="?", default="small", help="demo data set (default: small)")
    demo.add_argument("--alpha", type=float, default=0.05, help="1 - confidence level")
    demo.add_argument("--json", metavar="FILE", help="also write the results as JSON")
    demo.set_defaults(func=_demo)
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except McexactError as exc:
        print(f"mcexact: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
