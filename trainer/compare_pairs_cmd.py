"""``kridge compare MODEL LABFILE --pairs FILE --id COL`` (:mod:`trainer.compare_pairs`)."""

from __future__ import annotations

from service.store import Store, now_iso
from trainer import compare as cmp
from trainer import compare_pairs as cp
from trainer.compare_text import COMPARE_CAUTION
from trainer.errors import UserError

#: Options of kridge compare that re-score versions, which the served pairs do not need.
_NOT_WITH_PAIRS = ("time", "time_format", "window", "since", "report", "keep_result",
                   "permutations", "drop_incomplete")


def _versions(text: str | None) -> tuple[int, int] | None:
    if text is None:
        return None
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 2 or not all(p.isascii() and p.isdigit() for p in parts):
        raise UserError(f"with --pairs, --versions takes LIVE,SHADOW such as 3,5, not {text!r}")
    return int(parts[0]), int(parts[1])


def compare_pairs(args, level: float | None) -> tuple[dict, dict | None]:
    """Run the served comparison: its JSON-ready document (NaN left in) and the gate."""
    used = [f"--{o.replace('_', '-')}" for o in _NOT_WITH_PAIRS
            if getattr(args, o) not in (None, False)]
    if used:
        raise UserError(f"{', '.join(used)} cannot be combined with --pairs (the served "
                        "predictions are scored as they are)")
    st = Store(args.store)
    versions = _versions(args.versions)
    st.versions(args.model)  # an unknown model: the store's own message
    # the pairs file names no targets: the live version's manifest has them, in order
    first_live = versions[0] if versions else st.live_version(args.model)
    if first_live is None:
        raise UserError("no version is live; name the pair with --versions LIVE,SHADOW")
    manifest = st.read_manifest(args.model, first_live)
    targets, features = list(manifest["targets"]), list(manifest["features"])
    versions, pairs, pair_counts = cp.read_pairs(args.pairs, args.model, len(targets),
                                                 versions)
    if versions[0] != first_live:
        manifest = st.read_manifest(args.model, versions[0])
        targets, features = list(manifest["targets"]), list(manifest["features"])
    present, lab, lab_counts = cp.read_lab_by_id(args.data, args.id_column, targets,
                                                 args.sep, args.decimal)
    rows, live, shadow = cp.join(pairs, lab, targets, present, features)
    if rows.y.shape[0] == 0:
        raise UserError(f"no row id of {args.data} is in {args.pairs} "
                        f"({len(lab)} lab rows, {len(pairs)} served rows with an id)")
    result = cp.compare_served(rows, live, shadow, versions,
                               cmp.DEFAULT_LEVEL if level is None else level)
    gate = cmp.gate(result["verdicts"], versions[1], level) if level is not None else None
    doc = dict(cmp.public(result), model=args.model, targets=present,
               counts={**rows.counts, **pair_counts, **lab_counts}, gate=gate,
               figures_method=cp.FIGURES_METHOD, test_method=cp.TEST_METHOD,
               caution=COMPARE_CAUTION, pairs=str(args.pairs), data=str(args.data),
               time=now_iso())
    return doc, gate
