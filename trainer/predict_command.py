"""``kridge predict MODEL DATA``: its arguments and how its output is made visible.

Nothing is written where the user looks before the whole file is scored: with ``--out`` the
rows go to ``FILE.partial`` beside it, renamed onto ``FILE`` at the end (removed on a
refusal); to standard output they are buffered in a spooled temporary file, held in memory
up to :data:`SPOOL_BYTES` and on disk (``$TMPDIR``) beyond, then copied out. So a refusal
on the last line leaves no output file and writes nothing to standard output.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile

#: Output held in memory before the stdout buffer moves to a temporary file.
SPOOL_BYTES = 32 << 20

#: Every format the reader takes (trainer.read.source), for the help.
FORMATS = ("CSV (any of , ; tab | between cells, decimal point or comma), Parquet "
           "(.parquet, .pq) or Excel (.xlsx, .xlsm, first sheet)")


def _names(text: str) -> list[str]:
    items = [t.strip() for t in text.split(",")]
    if not all(items):
        raise argparse.ArgumentTypeError(f"empty name in {text!r}")
    return items


def add_arguments(pr: argparse.ArgumentParser) -> None:
    """The arguments of ``kridge predict``."""
    pr.add_argument("model")
    pr.add_argument("data", help=f"rows to score: {FORMATS}")
    pr.add_argument("--version")
    pr.add_argument("--out", help="output CSV (default: standard output), written in the "
                                  "input's separator and decimal mark")
    pr.add_argument("--coverage", type=float, help="add interval bounds at this coverage")
    pr.add_argument("--keep", type=_names, default=[], metavar="COL[,COL2]",
                    help="columns copied to the output as written (sample ids, time stamps) "
                         "to join the results back")
    pr.add_argument("--with-inputs", action="store_true",
                    help="also write the model's input columns as read")
    pr.add_argument("--drop-incomplete", action="store_true",
                    help="skip rows with a missing input instead of refusing the file: "
                         "written with empty results and the reason in column 'skipped'")
    pr.add_argument("--sep", help="CSV input's separator (default: detected); for Parquet "
                                  "or Excel input, the output's (default ',')")
    pr.add_argument("--decimal", choices=(".", ","),
                    help="CSV input's decimal mark (default: detected); for Parquet or Excel "
                         "input, the output's (default '.')")
    pr.add_argument("--quiet", action="store_true")


def run(args, store) -> int:
    """Score ``args.data`` with the model; the counts and the caution go to stderr."""
    from service.model import load_model
    from service.store import check_version
    from trainer.score_file import ScoreOptions, envelope_note, score_file

    model = load_model(store, args.model, args.version and check_version(args.version))
    opts = ScoreOptions(coverage=args.coverage, keep=args.keep, with_inputs=args.with_inputs,
                        drop_incomplete=args.drop_incomplete, sep=args.sep,
                        decimal=args.decimal)
    if args.out:
        tmp = f"{args.out}.partial"
        try:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                scored = score_file(model, args.data, fh, opts, args.quiet)
            os.replace(tmp, args.out)
        finally:
            if os.path.exists(tmp):
                os.unlink(tmp)
        print(f"{scored.rows} rows scored with {model.name} v{model.version} -> {args.out}",
              file=sys.stderr)
    else:
        with tempfile.SpooledTemporaryFile(SPOOL_BYTES, mode="w+", newline="",
                                           encoding="utf-8") as buf:
            scored = score_file(model, args.data, buf, opts, quiet=True)
            buf.seek(0)
            shutil.copyfileobj(buf, sys.stdout)
        sys.stdout.flush()
    print(envelope_note(scored), file=sys.stderr)
    return 0
