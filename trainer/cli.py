"""The ``kridge`` command line.

Every user mistake ends as one line on stderr and exit status 2; a failed ``verify`` exits 1,
as does ``drift --fail-on-drift`` on an alarm; a failed ``compare --require-better`` exits 3;
a bug in kridge itself shows its traceback and exits 70.
Heavy imports (scipy, matplotlib) happen inside the commands that need them, so ``kridge
serve`` works in a serving image without the trainer's extras.
"""

from __future__ import annotations

import argparse
import json
import os
import sys

from service.model import PRECISIONS, verifier
from service.settings import DEFAULT_STORE
from service.store import Store, StoreError, check_version
from service.text_safety import visible
from trainer import compare_cli, shadow_cmd
from trainer.cli_nystrom import nystrom_options
from trainer.errors import UserError

EXIT_USER = 2
EXIT_FAULT = 1


def _csv_list(text: str) -> list[str]:
    items = [t.strip() for t in text.split(",")]
    if not all(items):
        raise argparse.ArgumentTypeError(f"empty name in {text!r}")
    return items


def _store(args) -> Store:
    return Store(args.store)


def cmd_train(args) -> int:
    from trainer.job import TrainOptions, train

    opts = TrainOptions(
        data=args.data, targets=args.target, name=args.name, features=args.features,
        kernel=args.kernel, gamma=args.gamma, degree=args.degree, coef0=args.coef0,
        ridge=args.ridge, holdout=args.holdout, seed=args.seed, release=args.release,
        store=args.store, quiet=args.quiet, report=not args.no_report,
        precision=args.precision, time=args.time, time_format=args.time_format,
        drop_incomplete=args.drop_incomplete,
        sep=args.sep, decimal=args.decimal, method=args.method, landmarks=args.landmarks,
        landmark_scheme=args.landmark_scheme, cluster=args.cluster, solver=args.solver,
        target_range=args.target_range, shared_kernel=args.shared_kernel,
        cg_stop=args.cg_stop, cg_max_iter=args.cg_max_iter, group=args.group)

    def log(*a, **k):
        if not args.quiet:
            print(*map(visible, map(str, a)), file=sys.stderr, **k)

    summary = train(opts, log=log)
    for w in summary["warnings"]:  # even with --quiet: they concern the model itself
        print(f"warning: {visible(w['message'])} [{w['code']}]", file=sys.stderr)
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    from trainer.show import error_lines, precision_line, print_pairs

    print_pairs([
        ("model", f"{summary['name']} v{summary['version']}"
                  + ("  (live)" if summary["live"] else "  (not live: kridge release "
                     f"{summary['name']} {summary['version']})")),
        ("rows", f"{summary['rows']} ({summary['data']})"),
        ("method", summary["method"]),
        ("features", f"{len(summary['features'])}: {', '.join(summary['features'])}"),
        ("targets", ", ".join(summary["targets"])),
        ("kernel", summary["kernel"]),
        ("ridge", summary["ridge_text"]),
        *error_lines(summary["metrics"]),
        *([("tuning", summary["tuning"])] if summary.get("tuning") else []),
        *([("report", summary["report"])] if summary.get("report") else []),
        ("precision", precision_line(summary["precision"], summary["precision_check"])),
        ("time", f"{summary['seconds']} s"),
        ("store", summary["store"]),
    ])
    return 0


def cmd_versions(args) -> int:
    from service.version_facts import facts
    from trainer.show import table

    st = _store(args)
    live = st.live_version(args.model)
    rows, details = [], []
    for v in st.versions(args.model):
        try:
            m = st.read_manifest(args.model, v)
        except StoreError as exc:
            why = str(exc).split(": ", 1)[-1]
            rows.append(["*" if v == live else "", v, "?", "broken", why, "", "", "", "", ""])
            details.append({"version": v, "fault": why})
            continue
        f = dict(facts(m), compared=compare_cli.on_record(st.comparisons(args.model, v)))
        details.append({"version": v, **f})
        rows.append([
            "*" if v == live else "", v, m.get("created", "?"), f["method"], f["features"],
            f["training_rows"], f["data_sha256"],
            f"{f['kernel']} ridge={f['ridge']}", f["error"], f["compared"],
        ])
    if args.json:
        print(json.dumps({"model": args.model, "live": live, "versions": [r[1] for r in rows],
                          "details": details}))
    else:
        table(["live", "version", "created", "method", "features", "rows", "data sha256",
               "kernel", "error", "comparisons"], rows)
    return 0


def cmd_release(args) -> int:
    st = _store(args)
    rec = st.release(args.model, check_version(args.version), check=verifier(st, args.model))
    prev = rec["previous"]
    print(f"{args.model}: version {rec['version']} is live (was {prev if prev else 'none'})")
    return 0


def cmd_rollback(args) -> int:
    st = _store(args)
    rec = st.rollback(args.model, check=verifier(st, args.model))
    print(f"{args.model}: rolled back to version {rec['version']} (was {rec['previous']})")
    return 0


def _resolve_version(st: Store, name: str, version) -> int:
    if version is not None:
        return check_version(version)
    live = st.live_version(name)
    return st.versions(name)[-1] if live is None else live


def cmd_inspect(args) -> int:
    from trainer.show import manifest_summary, print_pairs

    st = _store(args)
    if args.other is not None:
        return _inspect_changes(st, args)
    v = _resolve_version(st, args.model, args.version)
    m = st.read_manifest(args.model, v)
    if args.json:
        print(json.dumps(m, indent=2))
    else:
        print_pairs(manifest_summary(m, st.live_version(args.model)))
        report = st.version_dir(args.model, v) / "report.html"
        if report.exists():
            print(f"report  {report}")
    return 0


def _inspect_changes(st: Store, args) -> int:
    """``kridge inspect MODEL A B``: what changed from version A to version B."""
    from service.version_facts import changes
    from trainer.show import change_lines, print_pairs

    a, b = check_version(args.version), check_version(args.other)
    diff = changes(st.read_manifest(args.model, a), st.read_manifest(args.model, b))
    if args.json:
        print(json.dumps({"model": args.model, "from": a, "to": b, "changes": diff}, indent=2))
    else:
        print_pairs([("model", f"{args.model}: v{a} → v{b}"), *change_lines(diff)])
    return 0


def cmd_verify(args) -> int:
    from service.model import verify

    st = _store(args)
    versions = [check_version(args.version)] if args.version else st.versions(args.model)
    faults = 0
    for v in versions:
        try:
            verify(st, args.model, v)
            print(f"{args.model} v{v}: ok")
        except (StoreError, OSError) as exc:  # a fault of the store, never a kridge bug
            faults += 1
            why = str(exc) if isinstance(exc, StoreError) else exc.strerror or type(exc).__name__
            print(f"{args.model} v{v}: FAULT: {visible(why)}", file=sys.stderr)
    return EXIT_FAULT if faults else 0


def cmd_predict(args) -> int:
    from trainer.predict_command import run

    return run(args, _store(args))


def cmd_drift(args) -> int:
    from service.model import load_model
    from trainer import drift_check

    level = drift_check.check_level(args.fail_on_drift)
    model = load_model(_store(args), args.model, args.version and check_version(args.version))
    result = drift_check.run(model, args.data, args.permutations, args.seed)
    if args.json:
        print(json.dumps(drift_check.as_json(model, result, level), indent=2))
    else:
        print(drift_check.as_text(model, result, level))
    return EXIT_FAULT if level is not None and result.p_value < level else 0


def cmd_serve(args) -> int:
    from service.launch import serve

    return serve(bind=args.bind, workers=_workers(args.workers), store=args.store)


def _workers(text: str | None) -> int | None:
    """``--workers``: a whole number of at least 1 (ASCII digits), None when not given."""
    if text is None:
        return None
    if not (text.isascii() and text.isdigit()) or int(text) < 1:
        raise UserError(f"--workers must be a whole number of at least 1, not {text!r}")
    return int(text)


def cmd_demo(args) -> int:
    from trainer.demo import run_demo

    return run_demo(store=args.store, bind=args.bind, smoke=args.smoke)


def _train_arguments(t: argparse.ArgumentParser) -> None:
    """The arguments of ``kridge train``: data and names, kernel, splits, method, output."""
    t.add_argument("data", help="CSV with a header row, .parquet or .xlsx")
    t.add_argument("--target", required=True, type=_csv_list,
                   help="target column(s), comma-separated")
    t.add_argument("--name", required=True, help="model name")
    t.add_argument("--features", type=_csv_list, help="feature columns (default: all but targets)")
    t.add_argument("--kernel", default="rbf",
                   help="linear, polynomial, rbf, laplacian, sigmoid, matern32, matern52, or auto")
    t.add_argument("--gamma", type=float)
    t.add_argument("--degree", type=float)
    t.add_argument("--coef0", type=float)
    t.add_argument("--ridge", type=float, help="ridge penalty λ (omit to tune)")
    t.add_argument("--shared-kernel", action="store_true",
                   help="several targets: one kernel and ridge for all (default: each its own)")
    t.add_argument("--holdout", type=float, default=0.2, help="held-out fraction (default 0.2)")
    t.add_argument("--seed", type=int, default=0)
    t.add_argument("--release", action="store_true", help="make the new version live")
    t.add_argument("--no-report", action="store_true", help="skip report.html")
    t.add_argument("--target-range", metavar="LO:HI", help="per --target, comma-separated "
                   "(0: low only): served predictions and intervals are clipped to it")
    t.add_argument("--precision", choices=PRECISIONS, default="float64",
                   help="serving precision; float32 records its measured error (default float64)")
    t.add_argument("--time", metavar="COL",
                   help="timestamp column (ISO 8601 or a number): hold out the most recent "
                        "rows and tune by blocked cross-validation in time order")
    t.add_argument("--group", metavar="COL",
                   help="group column (a mix, batch or sample id; not a feature): every row "
                        "of a group stays on one side of the holdout and of each tuning fold")
    t.add_argument("--time-format", metavar="FMT",
                   help="how the --time column is written, in strftime codes (e.g. "
                        "'%%d.%%m.%%Y %%H:%%M'; default: ISO 8601, a number, or day-first/"
                        "month-first dates when the column shows which)")
    t.add_argument("--drop-incomplete", action="store_true",
                   help="leave out (and count) rows with a missing feature value")
    t.add_argument("--sep", help="CSV separator (default: detected)")
    t.add_argument("--decimal", choices=(".", ","), help="CSV decimal mark (default: detected)")
    t.add_argument("--method", choices=("exact", "nystrom", "auto"), default="auto",
                   help="exact KRR, Nyström on landmark rows, or auto by row count (default)")
    nystrom_options(t)
    t.add_argument("--quiet", action="store_true")
    t.add_argument("--json", action="store_true", help="print the summary as JSON")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="kridge",
        description="Kernel ridge regression: train, freeze into a versioned bundle, serve.",
    )
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def add(name, func, help_):
        sp = sub.add_parser(name, help=help_, description=help_)
        sp.add_argument("--store", help=f"store root (default: $KRIDGE_STORE or ./{DEFAULT_STORE})")
        sp.set_defaults(func=func)
        return sp

    t = add("train", cmd_train, "fit a model from a CSV/Parquet file and publish a new version")
    _train_arguments(t)

    v = add("versions", cmd_versions, "list versions; * marks the live one")
    v.add_argument("model")
    v.add_argument("--json", action="store_true")

    r = add("release", cmd_release, "make a version live (after verifying it)")
    r.add_argument("model")
    r.add_argument("version")

    rb = add("rollback", cmd_rollback, "make the previously live version live again")
    rb.add_argument("model")

    i = add("inspect", cmd_inspect, "summary of a version's manifest (default: live); with "
            "two versions A B, what changed from A to B")
    i.add_argument("model")
    i.add_argument("version", nargs="?")
    i.add_argument("other", nargs="?", metavar="version_b")
    i.add_argument("--json", action="store_true",
                   help="the whole manifest (or, with A B, the changes) as JSON")

    ve = add("verify", cmd_verify, "check checksums and loadability (all versions by default)")
    ve.add_argument("model")
    ve.add_argument("version", nargs="?")

    from trainer.predict_command import FORMATS, add_arguments

    pr = add("predict", cmd_predict, f"offline batch predictions of {FORMATS} to a CSV")
    add_arguments(pr)

    dr = add("drift", cmd_drift, "kernel two-sample test: do new inputs differ from the "
             "training inputs? (no target needed)")
    dr.add_argument("model")
    dr.add_argument("data", help="CSV, Parquet or Excel file with the model's feature columns")
    dr.add_argument("--version")
    dr.add_argument("--json", action="store_true", help="the result as JSON")
    dr.add_argument("--fail-on-drift", type=float, metavar="LEVEL",
                    help="exit 1 when the p-value is below LEVEL (to gate a pipeline)")
    dr.add_argument("--permutations", type=int, default=None,
                    help="permutations behind the p-value (default 500)")
    dr.add_argument("--seed", type=int, default=0, help="seed of subsamples and permutations")

    compare_cli.add_arguments(add("compare", compare_cli.cmd_compare, compare_cli.HELP))
    s = add("serve", cmd_serve, "run the HTTP service under gunicorn")
    s.add_argument("--bind", default=None,
                   help="HOST:PORT (default $KRIDGE_BIND or 127.0.0.1:8000)")
    s.add_argument("--workers", default=None,
                   help="worker processes (default $KRIDGE_WORKERS, else one per usable core, "
                        "at least 2)")

    shadow_cmd.register(add)
    d = add("demo", cmd_demo, "demo data -> train -> release -> serve, with example calls")
    d.add_argument("--bind", default=None)
    d.add_argument("--smoke", action="store_true", help="make the example calls, then exit")
    return p


#: Exit status for a bug in kridge itself (sysexits.h EX_SOFTWARE): distinct from a user
#: error (2) and a failed verify (1), and shown with its traceback.
EXIT_BUG = 70


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except (UserError, StoreError) as exc:  # by type: the checks raise UserError
        return _user_error(args.command, exc)
    except BrokenPipeError:
        # output piped into e.g. `head`, which exited: stop quietly, as other Unix tools do;
        # point stdout at /dev/null so the interpreter's final flush does not fail again
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141
    except OSError as exc:  # unreadable/unwritable paths the user named: one line
        return _user_error(args.command, exc)
    except KeyboardInterrupt:
        return 130
    except Exception:
        return _bug(args.command)


def _user_error(command: str, exc: BaseException) -> int:
    """The one line on stderr for a mistake of the user's (names shown escaped)."""
    print(f"kridge {command}: error: {visible(str(exc))}", file=sys.stderr)
    return EXIT_USER


def _bug(command: str) -> int:
    """A fault in kridge itself: the whole traceback, then a line saying so."""
    import traceback

    traceback.print_exc()
    print(f"kridge {command}: internal error (a bug in kridge, not in your input); please "
          "report it with the traceback above", file=sys.stderr)
    return EXIT_BUG


if __name__ == "__main__":
    sys.exit(main())
