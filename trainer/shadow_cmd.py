"""``kridge shadow MODEL VERSION | --off``: name the version the service scores beside the
live one on real traffic (never answering with it), or end that.

The version is verified first, as a release would be; the pointer is ``shadow.json`` next
to live.json (:mod:`service.store.shadowing`). ``kridge shadow MODEL`` alone says which
version is the shadow now.
"""

from __future__ import annotations

import argparse

from service.model import verifier
from service.store import Store, check_name, check_version
from trainer.errors import UserError


def cmd_shadow(args) -> int:
    st = Store(args.store)
    name = check_name(args.model)
    if args.off and args.version is not None:
        raise UserError("give either a VERSION to shadow or --off, not both")
    if args.off:
        rec = st.end_shadow(name)
        print(f"{name}: no shadow version now" + (
            f" (was version {rec['version']})" if rec and rec["version"] else
            " (none was named)"))
        return 0
    if args.version is None:
        st.versions(name)  # NotFound for an unknown model
        entry = st.shadow(name)
        print(f"{name}: no shadow version" if entry is None else
              f"{name}: version {entry['version']} is the shadow (since {entry['since']})")
        return 0
    version = check_version(args.version)
    if version not in st.versions(name):
        raise UserError(f"model {name!r} has no version {version}")
    if version == st.live_version(name):
        raise UserError(f"{name}: version {version} is the live version; a shadow is "
                        "scored beside the live one, so name another")
    rec = st.set_shadow(name, version, check=verifier(st, name))
    was = f" (was version {rec['previous']})" if rec["previous"] else ""
    print(f"{name}: version {version} is the shadow{was}: the service scores it beside the "
          "live version and never answers with it; `kridge release "
          f"{name} {version}` makes it live, `kridge shadow {name} --off` ends it")
    return 0


def register(add) -> None:
    """Add the subcommand through the CLI's ``add(name, func, help)``."""
    sp: argparse.ArgumentParser = add(
        "shadow", cmd_shadow, "score a version beside the live one on real traffic, never "
        "answering with it (--off ends it; no VERSION: show the shadow)")
    sp.add_argument("model")
    sp.add_argument("version", nargs="?")
    sp.add_argument("--off", action="store_true", help="end the shadow")
