"""The ``hierchoice`` command line: every command's code. It parses arguments, calls the library, prints."""

from __future__ import annotations

import argparse
import contextlib
import logging
import sys
import warnings
from collections.abc import Iterator, Sequence
from pathlib import Path

from ._args import whole_number_option
from .exceptions import ArchiveError, HierchoiceError, HierchoiceWarning, SpecError

EXIT_BAD_INPUT = 2


def _cmd_validate(args: argparse.Namespace) -> int:
    from .data.panel import load_panel
    from .spec import Spec

    spec = Spec.from_toml(args.spec)
    panel = load_panel(args.data, spec)
    print(f"{args.data}: valid choice panel")
    print(panel.summary)
    return 0


def _fit_method(args: argparse.Namespace) -> str:
    """``--method``, with ``--approximate`` as the older spelling of ``--method advi``."""
    if args.approximate and args.method not in (None, "advi"):
        raise SpecError(f"--approximate means --method advi; it cannot be combined with --method {args.method}.")
    return args.method or ("advi" if args.approximate else None)  # None: the spec's sampling.method


def _cmd_fit(args: argparse.Namespace) -> int:
    from ._io import claim_folder
    from .data.panel import load_panel
    from .inference.results import save_fit
    from .inference.sampling import fit
    from .spec import Spec

    claim_folder(args.out, "results", inputs=(args.data, args.spec))  # refuse before the fit, not after
    spec = Spec.from_toml(args.spec)
    panel = load_panel(args.data, spec)
    print(panel.summary)
    result = fit(panel, spec, draws=args.draws, tune=args.tune, chains=args.chains, seed=args.seed,
                 backend=args.backend, progressbar=not args.quiet,
                 method=_fit_method(args),
                 person_batch=args.person_batch if args.person_batch is not None else "auto",
                 client=args.scheduler)
    out = save_fit(result, args.out)
    post = result.posterior  # not the fit's display, which runs the convergence checks: hierchoice check does that
    print(f"\nChoiceFit({result.panel.n_persons} persons, {result.panel.n_tasks} tasks, {post.sizes['chain']} chains x "
          f"{post.sizes['draw']} draws, backend {result.info.get('backend')}), {result.info['wall_seconds']:.1f} s")
    table = result.population()
    print(table[["quantity", "attribute", "other", "mean", "sd", "hdi_low", "hdi_high", "eti_low", "eti_high"]]
          .to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    if result.approximate:
        from .inference.results import APPROXIMATE_CAUTION

        print(f"\nCAUTION: {APPROXIMATE_CAUTION}")
    print(f"\nresults written to {out}/ (check convergence before reading them: hierchoice check {out})")
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    from .diagnostics.folder import check_folder, format_verdict

    report, code = check_folder(Path(args.folder))
    print(format_verdict(report))
    print(f"\nwrote {Path(args.folder) / 'diagnostics.json'} and the diagnostic plots")
    return code


def _cmd_holdout(args: argparse.Namespace) -> int:
    """Refit without each person's last (or random) tasks; score and calibrate them; write into a results folder."""
    from ._io import claim_folder
    from .data.panel import load_panel
    from .diagnostics.holdout import format_holdout, holdout_folder
    from .spec import Spec

    inputs = (args.data, args.spec)
    claim_folder(args.out, "results", inputs=inputs)  # refuse before the fits, not after
    spec = Spec.from_toml(args.spec)
    panel = load_panel(args.data, spec)
    print(f"holding out {args.tasks} task(s) per person ({args.method}); fitting the mixed"
          f"{'' if args.no_fixed else ' and the fixed-taste'} model on the rest...", flush=True)
    summary = holdout_folder(panel, args.out, spec=spec, tasks=args.tasks, method=args.method, seed=args.split_seed,
                             compare_fixed=not args.no_fixed, inputs=inputs, draws=args.draws, tune=args.tune,
                             chains=args.chains, fit_seed=args.seed, progressbar=not args.quiet)
    print(format_holdout(summary))
    print(f"\nwrote holdout.json, holdout_tasks.csv and holdout_reliability.png into {args.out}/ "
          f"(hierchoice report {args.out} shows them)")
    return 0


def _results_folder(folder: str) -> Path:
    """``folder`` as a path, refused here if it does not exist or is not a folder (before anything is read)."""
    path = Path(folder)
    if not path.exists():
        raise ArchiveError(f"The results folder {folder!r} does not exist; give the folder that 'hierchoice fit "
                           "--out' wrote.")
    if not path.is_dir():
        raise ArchiveError(f"{folder!r} is a file, not a results folder; give the folder that 'hierchoice fit "
                           "--out' wrote.")
    return path


@contextlib.contextmanager
def _printed_here() -> Iterator[None]:
    """Hold back the library's warnings and log of its records: the command prints each record once itself."""
    logger = logging.getLogger("hierchoice")

    def hold(record: logging.LogRecord) -> bool:
        return False

    logger.addFilter(hold)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", HierchoiceWarning)
            yield
    finally:
        logger.removeFilter(hold)


def _cmd_report(args: argparse.Namespace) -> int:
    from .report.html import write_report

    path = write_report(_results_folder(args.folder), market=args.market, prob=args.prob)
    print(f"report: {path}")
    return 0


def _cmd_shares(args: argparse.Namespace) -> int:
    from ._io import write_with
    from .analysis.shares import predict_shares
    from .inference.results import POSTERIOR_FILE, load_fit

    if args.out:
        target = Path(args.out).resolve()
        if target.is_dir():
            raise ArchiveError(f"--out {args.out!r} is a folder; give a CSV file name, e.g. shares.csv.")
        if target in (Path(args.market).resolve(), (Path(args.folder) / POSTERIOR_FILE).resolve()):
            raise ArchiveError(f"--out {args.out!r} is one of the inputs and would be overwritten; choose another "
                               "file name for the share table.")
    result = load_fit(_results_folder(args.folder))
    with _printed_here():  # predict_shares logs its warnings too; printed below, once
        table = predict_shares(result, args.market, persons=args.persons, prob=args.prob)
    if args.out:
        write_with(Path(args.out), lambda tmp: table.to_csv(tmp, index=False))
    print(table.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    for record in table.attrs.get("warnings", []):
        print(f"{'warning' if record.level == 'warning' else 'note'}: {record.message}", file=sys.stderr)
    if args.out:
        print(f"\nwrote {args.out}")
    return 0


def _cmd_calibrate(args: argparse.Namespace) -> int:
    """Calibration on the user's own design; writes calibration.nc and two plots; exit 1 when a parameter is flagged."""
    from ._io import atomic_dir, claim_folder
    from .data.panel import load_panel
    from .diagnostics.plots import save_figure
    from .spec import load_spec
    from .validation import (
        format_calibration,
        plot_ecdf_difference,
        plot_rank_histograms,
        save_result,
        simulation_based_calibration,
    )

    inputs = (args.data, args.spec)
    claim_folder(args.out, "calibration", inputs=inputs)  # refuse before hours of fits, not after
    spec = load_spec(args.spec)
    panel = load_panel(args.data, spec)
    seed = spec.sampling.seed if args.seed is None else args.seed
    result = simulation_based_calibration(panel, spec, fits=args.fits, seed=seed, workers=args.workers)
    with atomic_dir(args.out, kind="calibration", inputs=inputs) as tmp:
        save_result(result, tmp / "calibration.nc")
        save_figure(plot_rank_histograms(result), tmp / "rank_histograms.png")
        save_figure(plot_ecdf_difference(result), tmp / "ecdf_difference.png")
    print(format_calibration(result))
    print(f"\nresults written to {args.out}/ (calibration.nc, rank_histograms.png, ecdf_difference.png)")
    return 1 if bool(result["flagged"].any()) else 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    run_demo(Path(args.out), persons=args.persons, quick=args.quick, seed=args.seed)
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="hierchoice",
        description="Bayesian hierarchical choice models for panel choice data.",
    )
    from ._version import __version__

    parser.add_argument("--version", action="version", version=f"hierchoice {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("validate", help="load and check a choice table against a spec; print a summary")
    p.add_argument("data", help="long (or wide, with a [wide] table in the spec) CSV or Parquet file")
    p.add_argument("--spec", required=True, help="the TOML spec")
    p.set_defaults(func=_cmd_validate)

    p = sub.add_parser("fit", help="fit the hierarchical logit (NUTS, or the blocked sampler for large panels) and write a results folder")
    p.add_argument("data", help="long (or wide) CSV or Parquet file")
    p.add_argument("--spec", required=True, help="the TOML spec")
    p.add_argument("--out", required=True, help="results folder: a new one, or one that hierchoice wrote earlier (replaced whole, atomically)")
    # whole numbers checked as the command line is read, before the data: the spec's own limits
    p.add_argument("--draws", type=whole_number_option(1), help="draws per chain, >= 1 (overrides [sampling])")
    p.add_argument("--tune", type=whole_number_option(0), help="tuning steps per chain, >= 0")
    p.add_argument("--chains", type=whole_number_option(1), help="number of chains, >= 1")
    p.add_argument("--seed", type=whole_number_option(0),
                   help="random seed, >= 0: the same seed gives the same posterior")
    p.add_argument("--backend", choices=["auto", "pymc", "nutpie", "numpyro"], help="NUTS implementation")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--approximate", action="store_true",
                   help="mean-field ADVI instead of NUTS, for panels too large for NUTS (flagged approximate)")
    p.add_argument("--method", choices=["auto", "nuts", "blocked", "advi"], default=None,
                   help="overrides sampling.method: auto (the default) uses NUTS, or the exact blocked sampler from "
                        "10,000 persons; nuts or blocked force one; advi: approximate, intervals too narrow (as "
                        "--approximate)")
    p.add_argument("--person-batch", type=whole_number_option(1), default=None, metavar="N",
                   help="with --approximate: persons per random batch (default: 500 when the panel has over "
                        "1000 persons, else all)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="with the blocked sampler: run the person block on this Dask cluster (e.g. "
                        "tcp://host:8786), one shard of persons per worker; the draws are the same as without it")
    p.set_defaults(func=_cmd_fit)

    p = sub.add_parser("check", help="convergence verdict, predictive checks and LOO of a results folder")
    p.add_argument("folder", help="a results folder written by 'hierchoice fit'")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("holdout", help="refit without each person's last K tasks and score the held-out tasks "
                                       "(hit rate, log score, calibration)")
    p.add_argument("data", help="long (or wide) CSV or Parquet file")
    p.add_argument("--spec", required=True, help="the TOML spec")
    p.add_argument("--out", required=True, help="results folder to add the holdout files to (e.g. the one "
                                                 "'hierchoice fit' wrote), or a new folder")
    p.add_argument("--tasks", type=int, default=2, help="tasks held out per person (default 2)")
    p.add_argument("--method", choices=["last", "random"], default="last",
                   help="hold out each person's last tasks (default) or random ones")
    p.add_argument("--split-seed", type=int, default=0, help="seed of --method random (default 0)")
    p.add_argument("--no-fixed", action="store_true", help="skip the fixed-taste comparison fit")
    p.add_argument("--draws", type=int, help="draws per chain (overrides [sampling])")
    p.add_argument("--tune", type=int, help="tuning steps per chain")
    p.add_argument("--chains", type=int, help="number of chains")
    p.add_argument("--seed", type=int, help="random seed of the fits")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_cmd_holdout)

    p = sub.add_parser("report", help="write the self-contained HTML report (and CSV tables) of a results folder")
    p.add_argument("folder", help="a results folder written by 'hierchoice fit'")
    p.add_argument("--market", help="optional market CSV: one row per alternative, for scenario shares")
    p.add_argument("--prob", type=float, default=0.9, help="credible interval probability (default 0.9)")
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("shares", help="predicted market shares with credible intervals for a market table")
    p.add_argument("folder", help="a results folder written by 'hierchoice fit'")
    p.add_argument("--market", required=True, help="market CSV: one row per alternative with attribute values")
    p.add_argument("--out", help="write the share table to this CSV")
    p.add_argument("--persons", choices=["population", "panel"], default="population",
                   help="new persons from the population distribution (default) or the fitted panel's persons")
    p.add_argument("--prob", type=float, default=0.9, help="credible interval probability (default 0.9)")
    p.set_defaults(func=_cmd_shares)

    p = sub.add_parser("calibrate", help="simulation-based calibration of a spec on your own design (many fits)")
    p.add_argument("data", help="the choice table whose design (attributes, tasks) is reused")
    p.add_argument("--spec", required=True, help="the TOML spec")
    p.add_argument("--fits", type=int, default=100, help="number of simulate-and-fit replications (default 100)")
    p.add_argument("--out", default="calibration", help="output folder (default: calibration)")
    p.add_argument("--workers", type=int, help="local Dask workers (default: one per core)")
    p.add_argument("--seed", type=int, help="base seed (default: the spec's sampling.seed)")
    p.set_defaults(func=_cmd_calibrate)

    p = sub.add_parser("demo", help="run the whole job on the invented Harbourline ferry survey")
    p.add_argument("--out", default="hierchoice-demo", help="output folder (default: hierchoice-demo)")
    p.add_argument("--persons", type=whole_number_option(1), default=300,
                   help="respondents to simulate, at least 1 (default: 300)")
    p.add_argument("--seed", type=whole_number_option(0), default=7, help="simulation seed (default: 7)")
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
