"""Which version is live: live.json, the release history, release and rollback.

Release writes the history record and swaps live.json in together (all or nothing); rollback
replays the history to find the version live before.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from service.store.names import (
    Conflict,
    StoreError,
    now_iso,
)
from service.store.pointers import replace_pointer
from service.store.reading import StoreReader


class Releases(StoreReader):
    """Release and rollback of a model's versions."""

    def _set_live(self, mdir: Path, name: str, version: int, action: str, previous,
                  repaired: str | None = None, restart: bool = False) -> dict:
        """Append the history record and swap live.json in: all or nothing.

        The new pointer is written and flushed to a temp file first (where a full disk shows),
        then the record appended (cut back on failure) and the pointer renamed into place.
        """
        entry = {"version": version, "since": now_iso(), "previous": previous}
        record = {"time": entry["since"], "action": action, "version": version,
                  "previous": previous}
        if repaired:
            record["repaired"] = repaired
        if restart:  # rollback replays the history from here on (earlier lines are damaged)
            record["restart"] = True
        replace_pointer(mdir, "live.json", name, entry, record)
        return record

    def release(self, name: str, version: int, check: Callable[[int], None] | None = None) -> dict:
        """Make ``version`` live. ``check(version)`` may refuse it first (e.g. verify).

        Release is also the repair: a damaged or lost live.json is replaced by a fresh
        pointer, and a damaged history gets a record from which rollback starts anew; the
        history record says what was repaired.
        """
        version = self.existing_version(name, version, check)
        with self._locked(name) as mdir:
            notes, restart = [], False
            try:
                previous = self.live_version(name)
            except StoreError as exc:
                previous = None
                notes.append(f"{str(exc).split(': ', 1)[-1]}; replaced")
            try:
                stack = self.live_stack(name)
            except StoreError as exc:
                restart = True
                notes.append(f"{str(exc).split(': ', 1)[-1]}; rollback starts from this record")
            else:
                if previous is None and not notes and stack:
                    notes.append(f"live.json was missing although version {stack[-1]} was "
                                 "live; replaced")
                elif previous is not None and stack and previous != stack[-1]:
                    notes.append(f"live.json named version {previous} but the history last "
                                 f"made version {stack[-1]} live; both agree again")
            return self._set_live(mdir, name, version, "release", previous,
                                  repaired="; ".join(notes) or None, restart=restart)

    def live_stack(self, name: str) -> list[int]:
        """Versions that were live, oldest first, with rolled-back ones popped off.

        Replaying the history this way makes repeated rollbacks walk further back. The replay
        starts at the last record marked ``restart`` (a release that repaired a damaged
        history); a damaged line after it is a StoreError.
        """
        good, bad = self._history_lines(name)
        start = max((n for n, rec in good if rec.get("restart")), default=0)
        damaged = [n for n in bad if n > start]
        if damaged:
            raise StoreError(f"{name}: history.jsonl line {damaged[0]} is damaged")
        stack: list[int] = []
        for n, rec in good:
            if n < start:
                continue
            if rec["action"] == "release":
                if not stack or stack[-1] != rec["version"]:
                    stack.append(rec["version"])
            elif rec["action"] == "rollback" and stack:
                stack.pop()
        return stack

    def rollback(self, name: str, check: Callable[[int], None] | None = None) -> dict:
        """Make the previously live version live again (``check`` may refuse it first).

        :class:`Conflict` when there is nothing earlier, or when a damaged live.json or
        history leaves unknown what is live now or what was live before.
        """
        self.versions(name)  # NotFound for an unknown model
        fix = f"make the version you want live with `kridge release {name} VERSION`"
        with self._locked(name) as mdir:
            try:
                stack = self.live_stack(name)
            except StoreError as exc:
                raise Conflict(
                    f"cannot roll back {name}: {str(exc).split(': ', 1)[-1]}, so the versions "
                    f"live before are unknown; {fix} (this also repairs the history)") from None
            try:
                live = self.live_version(name)
            except StoreError as exc:
                last = f" (the history's last is version {stack[-1]})" if stack else ""
                raise Conflict(
                    f"cannot roll back {name}: {str(exc).split(': ', 1)[-1]}, so the version "
                    f"live now is unknown{last}; {fix} (this also replaces live.json)"
                ) from None
            if live is None and stack:
                raise Conflict(
                    f"cannot roll back {name}: live.json is missing although the history "
                    f"shows version {stack[-1]} live; {fix}")
            if stack and live != stack[-1]:
                raise Conflict(
                    f"cannot roll back {name}: live.json names version {live} but the history "
                    f"last made version {stack[-1]} live (changed by another tool?); {fix}")
            if len(stack) < 2:
                current = stack[-1] if stack else None
                what = f"version {current} is the first one released" if current else (
                    "nothing was released yet")
                raise Conflict(f"cannot roll back {name}: {what}; nothing earlier to go back to")
            if check is not None:
                check(stack[-2])
            return self._set_live(mdir, name, stack[-2], "rollback", stack[-1])
