"""The ``kridge train`` options that only a Nyström fit reads, as one argument group."""

from __future__ import annotations

import argparse

#: CG's default iteration cap, as the help states it (trainer.nystrom.cg.CG_MAX_ITER; not
#: imported: the parser must not load scipy for ``kridge serve``).
SHOWN_CG_CAP = 100


def nystrom_options(parser: argparse.ArgumentParser) -> None:
    """Add the landmark, solver and cluster options to ``kridge train``'s parser."""
    g = parser.add_argument_group("Nyström (large files)")
    g.add_argument("--landmarks", type=int, metavar="M",
                   help="Nyström landmark rows (default: from the row count and memory)")
    g.add_argument("--landmark-scheme", choices=("uniform", "kmeans++"),
                   help="how Nyström landmarks are chosen (default: uniform)")
    g.add_argument("--solver", choices=("direct", "cg", "auto"), default="auto",
                   help="Nyström solve: direct (m × m sums, every ridge at once), cg "
                        "(preconditioned conjugate gradient), or auto by landmark count")
    g.add_argument("--cg-stop", choices=("validation", "residual"), default="validation",
                   help="what stops CG: validation error levelling off, or the residual "
                        "(validation, default); the residual alone (residual)")
    g.add_argument("--cluster", metavar="ADDRESS",
                   help="Dask scheduler address: run the Nyström accumulation there")
    g.add_argument("--cg-max-iter", type=int, metavar="N",
                   help=f"cap on CG iterations, a bound on the solve's time (default "
                        f"{SHOWN_CG_CAP}); a fit stopped by the cap says so")
