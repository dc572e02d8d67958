"""The ``kridge compare`` command: arguments, the run, its outputs and its exit status.

Exit status: 0 when the comparison ran (and, with ``--require-better``, the candidate
passed); :data:`EXIT_NOT_BETTER` (3) when ``--require-better`` was given and the candidate
did not pass; 2 for a user error, as every command.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys

from service.model import load_model
from service.store import Store, now_iso
from trainer.compare_text import record_text as on_record
from trainer.errors import UserError

__all__ = ["EXIT_NOT_BETTER", "HELP", "add_arguments", "cmd_compare", "on_record"]

HELP = "score versions side by side on newly measured lab values"
#: ``--require-better`` and the candidate did not pass (distinct from 1 and 2).
EXIT_NOT_BETTER = 3


def add_arguments(sp: argparse.ArgumentParser) -> None:
    """The arguments of ``kridge compare``."""
    sp.add_argument("model")
    sp.add_argument("data", help="CSV, Parquet or Excel file of new rows with lab values")
    sp.add_argument("--versions", help="'all' or a list such as 3,5 (default: the live "
                    "version and the newest)")
    sp.add_argument("--time", metavar="COL", help="time column: rows in time order, figures "
                    "per window, Newey–West variance in the test")
    sp.add_argument("--time-format", metavar="FMT", help="how the --time column is written, "
                    "in strftime codes (default: ISO 8601, a number, or dates whose order the "
                    "column shows), as for kridge train")
    sp.add_argument("--window", help="window length with --time: 7d (default), 12h, 2w, 90m; "
                    "plain-number times: a number (default: 5 windows of equal counts)")
    sp.add_argument("--since", metavar="TIME", help="score only rows at or after TIME (with "
                    "--time), e.g. the lab values since the live version's release")
    sp.add_argument("--json", action="store_true", help="the result as JSON")
    sp.add_argument("--report", metavar="FILE", help="write an HTML report to FILE")
    sp.add_argument("--require-better", type=float, metavar="LEVEL",
                    help=f"exit {EXIT_NOT_BETTER} unless the candidate (the newest chosen "
                    "version that is not the baseline) beats the baseline at LEVEL")
    sp.add_argument("--keep-result", action="store_true", help="store the comparison's JSON "
                    "beside the candidate version (its checksummed files stay untouched)")
    sp.add_argument("--permutations", type=int, default=None,
                    help="permutations of the drift test (default 500)")
    sp.add_argument("--seed", type=int, default=0, help="seed of the drift test")
    sp.add_argument("--drop-incomplete", action="store_true",
                    help="leave out (and count) lab rows with a missing input")
    sp.add_argument("--pairs", metavar="FILE", help="score the live and shadow predictions "
                    "as served, from this pairs file (KRIDGE_SHADOW_PAIRS), joined to the "
                    "data's lab values on --id; --versions LIVE,SHADOW picks one pair")
    sp.add_argument("--id", metavar="COL", dest="id_column", help="with --pairs: the data's "
                    "row id column, matched to the ids the requests carried")
    sp.add_argument("--sep", help="CSV separator (default: detected)")
    sp.add_argument("--decimal", choices=(".", ","), help="CSV decimal mark (default: detected)")


def _level(value: float | None) -> float | None:
    if value is not None and not 0.0 < value < 1.0:
        raise UserError(f"--require-better must lie between 0 and 1, not {value:g}")
    return value


def _finite(obj):
    """JSON-ready copy: NaN and ±inf become null (JSON has no such numbers)."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_finite(v) for v in obj]
    return obj


def cmd_compare(args) -> int:
    """Run ``kridge compare`` (module docstring for the exit status)."""
    from trainer import compare as cmp
    from trainer.compare_data import parse_window, read_lab_rows
    from trainer.compare_text import as_text

    level = _level(args.require_better)
    if (args.pairs is None) != (args.id_column is None):
        raise UserError("--pairs and --id go together: the pairs file and the data's row id "
                        "column it is joined on")
    if args.pairs is not None:
        from trainer.compare_pairs import as_text as pairs_text
        from trainer.compare_pairs_cmd import compare_pairs

        doc, gate = compare_pairs(args, level)
        doc = _finite(doc)
        print(json.dumps(doc, indent=2, allow_nan=False) if args.json else
              "\n".join([pairs_text(doc), *([gate["reason"]] if gate else []), doc["caution"]]))
        return EXIT_NOT_BETTER if gate is not None and not gate["passed"] else 0
    if args.permutations is not None and args.permutations < 1:
        raise UserError(f"--permutations must be at least 1, not {args.permutations}")
    if (args.window is not None or args.time_format is not None) and args.time is None:
        raise UserError("--window and --time-format need --time (the time column)")
    st = Store(args.store)
    live = st.live_version(args.model)
    chosen = cmp.choose_versions(st.versions(args.model), live, args.versions)
    models = [load_model(st, args.model, v) for v in chosen]
    for m in models:
        if m.encoding.any:  # the lab rows are read as numbers, as by kridge drift
            raise UserError(f"{m.name} v{m.version} has text features "
                            f"({', '.join(m.encoding.categories)}); kridge compare takes "
                            "models of number features only")
    features = list(dict.fromkeys(f for m in models for f in m.features))
    targets = list(dict.fromkeys(t for m in models for t in m.targets))
    rows = read_lab_rows(args.data, features, targets, args.time, args.sep, args.decimal,
                         args.drop_incomplete, args.since, args.time_format)
    window = parse_window(args.window, rows.clock) if args.time else None
    result = cmp.compare(models, rows, live, cmp.DEFAULT_LEVEL if level is None else level,
                         window, args.permutations, args.seed)
    gate = None
    others = [v for v in chosen if v != result["baseline"]]
    if level is not None:
        if not others:
            raise UserError("--require-better needs a version besides the baseline "
                            f"v{result['baseline']}; name it with --versions")
        gate = cmp.gate(result["verdicts"], max(others), level)
    doc = _finite(dict(cmp.public(result), gate=gate, time=now_iso(), data=str(args.data)))
    if args.report:
        from trainer.compare_report import write_report

        write_report(args.report, result, doc, rows)
    if args.keep_result:
        if not others:
            raise UserError("--keep-result keeps a comparison beside the candidate; only the "
                            f"baseline v{result['baseline']} was scored")
        kept = st.keep_comparison(args.model, max(others), doc)
        print(f"comparison kept beside {args.model} v{max(others)}: comparisons/{kept}",
              file=sys.stderr)
    if args.json:
        print(json.dumps(doc, indent=2, allow_nan=False))
    else:
        print(as_text(doc, gate))
    if args.report:
        print(f"report: {os.path.abspath(args.report)}", file=sys.stderr)
    return EXIT_NOT_BETTER if gate is not None and not gate["passed"] else 0
