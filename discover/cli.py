"""The ``discover`` command."""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import time

from . import __version__
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
with status 2 (config), 3 (data), 4 (expression), 5 (model file), 6 (output
folder) or 7 (export arguments: operating point, format, output path); --debug
shows the traceback.
"""


def build_parser():
    parser = argparse.ArgumentParser(
        prog="discover",
        description="Identify sparse dynamical models dx/dt = f(x, u) with input terms from logged runs.",
        epilog=EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks of input errors")
    parser.add_argument("--version", action="version", version=f"discover {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    run = sub.add_parser("run", help="run the pipeline from a TOML config",
                         description="Run the pipeline from a TOML config and write the output folder.")
    run.add_argument("config", help="path to the TOML config")
    run.add_argument("--out", help="output folder (default: [output].dir, else out/<config name>)")
    run.add_argument("--force", action="store_true",
                     help="replace an existing output folder that discover wrote (never anything else)")
    run.add_argument("--verbose", action="store_true", help="print the seconds each stage took")
    rank = sub.add_parser("rank", help="score extra hypotheses against an earlier run's ranking",
                          description="Fit and score the [[ranking.hypotheses]] of a TOML file on the "
                                      "training and held-out runs of an earlier output folder, without "
                                      "refitting the candidates already ranked there.")
    rank.add_argument("out_dir", help="output folder of an earlier 'discover run'")
    rank.add_argument("hypotheses", help="TOML file with [[ranking.hypotheses]] entries")
    rank.add_argument("--save", help="where to write the combined table "
                                     "(default: OUT_DIR/ranking_updated.csv)")
    rank.add_argument("--allow-changed-data", action="store_true",
                      help="score even if a data file differs from the SHA-256 in provenance.json "
                           "(the combined table then mixes scores on different data)")
    from .export import FORMATS

    exp = sub.add_parser("export", help="export a saved model: Python module, LaTeX, A/B matrices",
                         description="Export model.json as a standalone Python module (rhs for "
                                     "scipy's solve_ivp), LaTeX equations, the A, B matrices of a "
                                     "linear model, or a linearization at an operating point.")
    exp.add_argument("model", help="path to model.json")
    exp.add_argument("--to", required=True, choices=FORMATS,
                     help="the format (required): " + ", ".join(FORMATS) + "; see the README's export table")
    exp.add_argument("--out", help="file to write (.csv for matrices as a table; default: standard output)")
    exp.add_argument("--x-op", dest="x_op", help="state operating point, comma-separated in state order "
                                                 "(write --x-op=-1,2 for a leading minus; required for "
                                                 "linearize, no default)")
    exp.add_argument("--u-op", dest="u_op", help="input operating point, comma-separated in input order "
                                                 "(required for linearize when the model has inputs, no "
                                                 "default)")
    sim = sub.add_parser("simulate", help="simulate a saved model on a run's recorded input",
                         description="Simulate model.json from the first sample of a run file, "
                                     "with that run's recorded input, and print the fit.")
    sim.add_argument("model", help="path to model.json")
    sim.add_argument("data", help="CSV or Parquet run with the model's state and input columns")
    sim.add_argument("--time", default=None,
                     help="name of the time column (default: the one the model was fitted with, else t)")
    sim.add_argument("--interpolation", default=None, choices=("auto", "linear", "zoh"),
                     help="input between samples: linear, zoh (zero-order hold) or auto (zoh when the "
                          "input mostly holds its values); default: the rule of the run that fitted the model")
    return parser


def _run(args, session):
    from .config import load_config
    from .data import resolve_files
    from .outputs import OutputClaim, default_output_dir, input_files, write_files
    from .pipeline import run
    from .report import summary

    settings = load_config(args.config)
    target = args.out if args.out else default_output_dir(settings.output.dir, settings.source, settings.base)
    inputs = input_files(settings) + resolve_files(settings.data.files, settings.base, settings.source)
    # Claimed before the computation: a target that cannot be written fails in one line, at once.
    with OutputClaim(target, force=args.force, inputs=inputs) as claim:
        session["claim"] = claim
        result = run(settings, progress=True)
        started = time.perf_counter()
        written = claim.publish(lambda folder: write_files(result, folder))
        outputs_seconds = time.perf_counter() - started
    if getattr(result, "spec", None) is not None:  # a run with hidden states
        from .hidden_report import summary
    print(summary(result))
    if args.verbose:
        stages = {**result.timings, "outputs": outputs_seconds}
        print("Stage times: " + ", ".join(f"{name} {seconds:.2f} s" for name, seconds in stages.items()))
    print(f"Output written to {written}")


def _rank(args, session):
    import os
    import tempfile
    from pathlib import Path

    from .exceptions import OutputError
    from .report import ranking_lines
    from .rerank import rank_more

    if not args.save and not Path(args.out_dir).is_dir():
        what = "is a file" if Path(args.out_dir).exists() else "does not exist"
        raise OutputError(f"{args.out_dir}: {what}; give the output folder of an earlier discover run "
                          "(the folder holding model.json and ranking.csv).")
    target = Path(args.save) if args.save else Path(args.out_dir) / "ranking_updated.csv"
    if not target.parent.is_dir():
        what = "is a file, not a folder" if target.parent.exists() else "does not exist"
        raise OutputError(f"{target}: {target.parent} {what}; create the folder or choose another --save path.")
    if target.is_dir():
        raise OutputError(f"{target}: is a folder; give a file name for --save, e.g. {target / 'ranking.csv'}.")
    if target.is_symlink() or (target.exists() and not is_ranking_table(target)):
        raise OutputError(f"{target}: exists and is not a ranking table discover wrote, so it is not "
                          "overwritten; give a new file name for --save.")
    table, criterion = rank_more(args.out_dir, args.hypotheses, allow_changed_data=args.allow_changed_data)
    try:
        handle, temporary = tempfile.mkstemp(prefix=".ranking-", dir=target.parent)
        os.close(handle)
        table.to_csv(temporary, index=False)
        os.replace(temporary, target)
    except OSError as err:
        raise OutputError(f"{target}: cannot write the table ({err.strerror}).") from None
    print("\n".join(ranking_lines(table, criterion, top=12)))
    print(f"Combined ranking written to {target}")


def is_ranking_table(path):
    """True for a CSV whose header is that of a ranking table (what --save may replace)."""
    try:
        with open(path, encoding="utf-8") as handle:
            return handle.readline().startswith("rank,candidate,source,n_terms,")
    except (OSError, UnicodeDecodeError):
        return False


def _export(args, session):
    from .export import export_main

    export_main(args)


def _simulate(args, session):
    from .replay import replay_file

    replay = replay_file(args.model, args.data, time=args.time, interpolation=args.interpolation)
    print(replay.describe())


def _terminate(signum, frame):
    # SIGTERM becomes an exception so that the output stage removes its staging folder.
    raise KeyboardInterrupt


def main(argv=None):
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, _terminate)  # first, so that even a slow start is interruptible
    try:
        parser = build_parser()
    except KeyboardInterrupt:  # a signal while the modules load
        print("discover: interrupted before starting; nothing was written.", file=sys.stderr)
        return 130
    args = parser.parse_args(argv)
    session = {}
    try:
        {"run": _run, "rank": _rank, "export": _export, "simulate": _simulate}[args.command](args, session)
    except DiscoverError as err:
        if args.debug:
            raise
        print(f"discover: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print(f"discover: interrupted; {_where_things_are(session)}", file=sys.stderr)
        return 130
    return 0


def _where_things_are(session):
    """What an interruption left, told as it is."""
    claim = session.get("claim")
    if claim is None or claim.state == "nothing written":
        return "no new output folder was written and an existing one is as it was."
    if claim.state == "new result in place":
        return f"the new result had already been written to {claim.path}."
    return f"{claim.state}; the next run to {claim.path} puts it back."


if __name__ == "__main__":
    sys.exit(main())
