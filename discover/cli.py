"""The ``discover`` command."""

from __future__ import annotations

import argparse
import signal
import sys
import threading

from .exceptions import DiscoverError

EXAMPLES = """\
examples:
  discover run configs/ship.toml                 identify the ship-steering demo
  discover run configs/bioreactor.toml --out out/bio --force
  discover rank out/ship more_hypotheses.toml    score extra structures, no refit of the rest
  discover export out/ship/model.json --to python --out ship_model.py
  discover export out/ship/model.json --to linearize --x-op=0,0 --u-op=0
  discover simulate out/ship/model.json data_demo/ship/heldout_sine.csv

A failure caused by the input (config, data, model file) prints one line and exits
with status 2 (config), 3 (data), 4 (expression), 5 (model file) or 6 (output
folder); --debug shows the traceback.
"""


def build_parser():
    parser = argparse.ArgumentParser(
        prog="discover",
        description="Identify sparse dynamical models dx/dt = f(x, u) with input terms from logged runs.",
        epilog=EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks of input errors")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    run = sub.add_parser("run", help="run the pipeline from a TOML config",
                         description="Run the pipeline from a TOML config and write the output folder.")
    run.add_argument("config", help="path to the TOML config")
    run.add_argument("--out", help="output folder (default: [output].dir, else out/<config name>)")
    run.add_argument("--force", action="store_true", help="replace an existing output folder")
    rank = sub.add_parser("rank", help="score extra hypotheses against an earlier run's ranking",
                          description="Fit and score the [[ranking.hypotheses]] of a TOML file on the "
                                      "training and held-out runs of an earlier output folder, without "
                                      "refitting the candidates already ranked there.")
    rank.add_argument("out_dir", help="output folder of an earlier 'discover run'")
    rank.add_argument("hypotheses", help="TOML file with [[ranking.hypotheses]] entries")
    rank.add_argument("--save", help="where to write the combined table "
                                     "(default: OUT_DIR/ranking_updated.csv)")
    from .export import FORMATS

    exp = sub.add_parser("export", help="export a saved model: Python module, LaTeX, A/B matrices",
                         description="Export model.json as a standalone Python module (rhs for "
                                     "scipy's solve_ivp), LaTeX equations, the A, B matrices of a "
                                     "linear model, or a linearization at an operating point.")
    exp.add_argument("model", help="path to model.json")
    exp.add_argument("--to", required=True, choices=FORMATS)
    exp.add_argument("--out", help="file to write (.csv for matrices as a table; default: standard output)")
    exp.add_argument("--x-op", dest="x_op", help="state operating point, comma-separated in state order "
                                                 "(write --x-op=-1,2 for a leading minus)")
    exp.add_argument("--u-op", dest="u_op", help="input operating point, comma-separated in input order")
    sim = sub.add_parser("simulate", help="simulate a saved model on a run's recorded input",
                         description="Simulate model.json from the first sample of a run file, "
                                     "with that run's recorded input, and print the fit.")
    sim.add_argument("model", help="path to model.json")
    sim.add_argument("data", help="CSV or Parquet run with the model's state and input columns")
    sim.add_argument("--time", default="t", help="name of the time column (default: t)")
    sim.add_argument("--interpolation", default="linear", choices=("linear", "zoh"))
    return parser


def _run(args):
    from .pipeline import run, write_outputs
    from .report import summary

    result = run(args.config, progress=True)
    target = write_outputs(result, args.out, force=args.force)
    print(summary(result))
    print(f"Output written to {target}")


def _rank(args):
    import os
    import tempfile
    from pathlib import Path

    from .pipeline import rank_more
    from .report import ranking_lines

    table = rank_more(args.out_dir, args.hypotheses)
    target = Path(args.save) if args.save else Path(args.out_dir) / "ranking_updated.csv"
    handle, temporary = tempfile.mkstemp(prefix=".ranking-", dir=target.parent)
    os.close(handle)
    table.to_csv(temporary, index=False)
    os.replace(temporary, target)
    print("\n".join(ranking_lines(table, "aicc", top=12)))
    print(f"Combined ranking written to {target}")


def _export(args):
    from .export import export_main

    export_main(args)


def _simulate(args):
    from pathlib import Path

    from .data import load_run
    from .model import load_model
    from .simulate import fit_metrics

    model = load_model(args.model)
    run = load_run(Path(args.data), time=args.time, states=model.state_names, inputs=model.input_names,
                   rename={}, missing="refuse", max_gap=1)
    sim = model.simulate(run.t, run.x[0], run.u, interpolation=args.interpolation)
    if sim.diverged:
        print(f"{run.name}: diverged ({sim.message})")
        return
    metrics = fit_metrics(run.x, sim.x)
    for state, fit, rmse in zip(model.state_names, metrics["fit_percent"], metrics["rmse"]):
        print(f"{run.name}: {state} fit {fit:.1f} %, RMSE {rmse:.4g}")


def _terminate(signum, frame):
    # SIGTERM becomes an exception so that the output stage removes its staging folder.
    raise KeyboardInterrupt


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, _terminate)
    try:
        {"run": _run, "rank": _rank, "export": _export, "simulate": _simulate}[args.command](args)
    except DiscoverError as err:
        if args.debug:
            raise
        print(f"discover: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("discover: interrupted; no new output folder was written and an existing one "
              "is as it was.", file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":
    sys.exit(main())
