"""The ``hierchoice`` command line. It only parses arguments and calls the public API."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from .exceptions import HierchoiceError

EXIT_BAD_INPUT = 2


def _cmd_validate(args: argparse.Namespace) -> int:
    from .panel import load_panel
    from .spec import Spec

    spec = Spec.from_toml(args.spec)
    panel = load_panel(args.data, spec)
    print(f"{args.data}: valid choice panel")
    print(panel.summary)
    return 0


def _cmd_fit(args: argparse.Namespace) -> int:
    from .archive import save_fit
    from .fit import fit
    from .panel import load_panel
    from .spec import Spec

    spec = Spec.from_toml(args.spec)
    panel = load_panel(args.data, spec)
    print(panel.summary)
    result = fit(panel, spec, draws=args.draws, tune=args.tune, chains=args.chains, seed=args.seed,
                 backend=args.backend, progressbar=not args.quiet,
                 method="advi" if args.approximate else "nuts")
    out = save_fit(result, args.out)
    print(f"\n{result!r}, {result.info['wall_seconds']:.1f} s")
    print(result.population().to_string(float_format=lambda v: f"{v:.4g}"))
    print(f"\nresults written to {out}/ (check convergence before reading them: hierchoice check {out})")
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    run_demo(Path(args.out), persons=args.persons, quick=args.quick, seed=args.seed)
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="hierchoice",
        description="Bayesian hierarchical choice models for panel choice data.",
    )
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("validate", help="load and check a choice table against a spec; print a summary")
    p.add_argument("data", help="long (or wide, with a [wide] table in the spec) CSV or Parquet file")
    p.add_argument("--spec", required=True, help="the TOML spec")
    p.set_defaults(func=_cmd_validate)

    p = sub.add_parser("fit", help="fit the hierarchical logit with NUTS and write a results folder")
    p.add_argument("data", help="long (or wide) CSV or Parquet file")
    p.add_argument("--spec", required=True, help="the TOML spec")
    p.add_argument("--out", required=True, help="results folder (replaced atomically)")
    p.add_argument("--draws", type=int, help="draws per chain (overrides [sampling])")
    p.add_argument("--tune", type=int, help="tuning steps per chain")
    p.add_argument("--chains", type=int, help="number of chains")
    p.add_argument("--seed", type=int, help="random seed: the same seed gives the same posterior")
    p.add_argument("--backend", choices=["auto", "pymc", "nutpie", "numpyro"], help="NUTS implementation")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--approximate", action="store_true",
                   help="mean-field ADVI instead of NUTS, for panels too large for NUTS (flagged approximate)")
    p.set_defaults(func=_cmd_fit)

    p = sub.add_parser("demo", help="run the whole job on the invented Harbourline ferry survey")
    p.add_argument("--out", default="hierchoice-demo", help="output folder (default: hierchoice-demo)")
    p.add_argument("--persons", type=int, default=300, help="respondents to simulate (default: 300)")
    p.add_argument("--seed", type=int, default=7, help="simulation seed (default: 7)")
    p.add_argument("--quick", action="store_true", help="few draws: a smoke run, not for reading results")
    p.set_defaults(func=_cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args))
    except HierchoiceError as err:
        print(f"error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:  # pragma: no cover
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
