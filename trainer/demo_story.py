"""The demo's second act, printed as commands: a raw-material change, its drift, the live
version's rising error, and a retrained version that has to win before it is released.

The data are our own (``demo_data/make_coating_data.py``): the second period's lab samples
(``coating_line_after_change.csv``, stamped ``sampled_at``) and the retraining file (the
first period and weeks 1–6 of the second), so weeks 7–8 stay fresh for the comparison.
"""

from __future__ import annotations

import shlex
from pathlib import Path

#: The first lab sample the retraining file leaves out (week 7 of the second period).
FRESH_SINCE = "2026-11-16T06:00:00Z"


def story_lines(demo_dir: Path, model: str, store: str, targets: list[str]) -> list[str]:
    """The commands of the second act, each with the line that says what it shows."""
    after = shlex.quote(str(demo_dir / "coating_line_after_change.csv"))
    retrain = shlex.quote(str(demo_dir / "coating_line_retrain.csv"))
    st = f"--store {shlex.quote(store)}"
    return [
        "# Act two: weeks later the plant phased in a new resin lot, and lab values arrived",
        "# for eight weeks of samples (hardness for about three in four of them).",
        "# 1. Has the process left what the live version knows? (kernel two-sample test)",
        f"kridge drift {model} {after} {st}",
        "# 2. The live version's error on those lab values, week by week: it rises as the",
        "#    new resin takes over",
        f"kridge compare {model} {after} --time sampled_at {st}",
        "# 3. A version retrained on both periods (weeks 1–6 of the second; not released)",
        f"kridge train {retrain} --target {','.join(targets)} --name {model} {st}",
        "# 4. Does it beat the live one on the fresh weeks 7–8, by more than noise? (exit 0",
        "#    if so, 3 if not; the result is kept beside the new version, see kridge versions)",
        f"kridge compare {model} {after} --time sampled_at --since {FRESH_SINCE} "
        f"--require-better 0.05 --keep-result --report /tmp/{model}-compare.html {st}",
        f"kridge versions {model} {st}",
        "# 5. Only then, and after review under your site's procedures:",
        f"#    kridge release {model} <the new version> {st}",
        "# A drift alarm is a reason to check, not proof the model is wrong; a comparison on",
        "# few lab values is weak (the verdict says so below 30).",
    ]
