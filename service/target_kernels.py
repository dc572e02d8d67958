"""Each target's kernel and ridge, as a manifest states them, and targets grouped by kernel.

A model with several targets may give each its own kernel (family and parameters) and its
own ridge. The manifest (schema 3) lists them in ``per_target``, one entry per target in the
order of ``targets``::

    "per_target": [{"target": "water", "kernel": {"name": "rbf", "params": {...}},
                    "ridge": 0.01}, ...]

and keeps the top-level ``kernel`` and ``ridge`` for what all targets share: each is the
common value when every target has the same, and ``null`` when they differ. Manifests of
schemas 1 and 2 have no ``per_target``: their one kernel and ridge belong to every target.

Serving evaluates one kernel block per distinct kernel (:func:`kernel_groups`): targets with
the same kernel share its evaluation and differ only in their dual columns, whatever their
ridges.
"""

from __future__ import annotations

from dataclasses import dataclass

from service.kernel_spec import KernelSpec


@dataclass(frozen=True)
class TargetKernel:
    """One target's kernel and ridge."""

    target: str
    spec: KernelSpec
    ridge: float | None  # None only for a manifest that does not state it

    def as_json(self) -> dict:
        """The manifest's ``per_target`` entry."""
        return {"target": self.target,
                "kernel": {"name": self.spec.name, "params": self.spec.params()},
                "ridge": self.ridge}


def _spec(kern: dict) -> KernelSpec:
    return KernelSpec.from_params(kern["name"], kern.get("params", {}))


def target_kernels(manifest: dict) -> list[TargetKernel]:
    """Every target's kernel and ridge, in ``targets`` order, from any readable manifest.

    Raises KeyError, TypeError or ValueError naming what is missing or inconsistent (the
    loader reports them as an incomplete manifest).
    """
    targets = list(manifest["targets"])
    entries = manifest.get("per_target")
    if entries is None:  # schemas 1 and 2: one kernel and ridge for all
        spec = _spec(manifest["kernel"])
        ridge = manifest.get("ridge")
        return [TargetKernel(t, spec, None if ridge is None else float(ridge))
                for t in targets]
    if [e["target"] for e in entries] != targets:
        raise ValueError("per_target does not list the targets in order")
    return [TargetKernel(e["target"], _spec(e["kernel"]),
                         None if e.get("ridge") is None else float(e["ridge"]))
            for e in entries]


def shared_entries(settings: list[TargetKernel]) -> dict:
    """The manifest's top-level ``kernel``, ``ridge`` and ``per_target`` for ``settings``:
    the top-level values are the shared ones, ``null`` where targets differ."""
    specs = {s.spec for s in settings}
    ridges = {s.ridge for s in settings}
    spec = next(iter(specs)) if len(specs) == 1 else None
    return {
        "kernel": None if spec is None else {"name": spec.name, "params": spec.params()},
        "ridge": next(iter(ridges)) if len(ridges) == 1 else None,
        "per_target": [s.as_json() for s in settings],
    }


def kernel_groups(specs: list[KernelSpec]) -> list[tuple[KernelSpec, list[int]]]:
    """Distinct kernels in order of first appearance, each with the target columns it
    serves: ``[rbf(γ=1), rbf(γ=1), laplacian(γ=.1)]`` → ``[(rbf, [0, 1]), (laplacian, [2])]``."""
    groups: dict[KernelSpec, list[int]] = {}
    for j, spec in enumerate(specs):
        groups.setdefault(spec, []).append(j)
    return list(groups.items())


def kernel_text(settings: list[TargetKernel]) -> str:
    """The kernel in words: ``rbf(gamma=0.1)`` when shared, else each target's
    (``water: rbf(gamma=0.1); fat: laplacian(gamma=0.02)``)."""
    if len({s.spec for s in settings}) == 1:
        return settings[0].spec.describe()
    return "; ".join(f"{s.target}: {s.spec.describe()}" for s in settings)


def ridge_text(settings: list[TargetKernel], digits: int = 6) -> str:
    """The ridge in words: one number when shared, else each target's."""
    def num(r: float | None) -> str:
        return "?" if r is None else f"{r:.{digits}g}"

    if len({s.ridge for s in settings}) == 1:
        return num(settings[0].ridge)
    return "; ".join(f"{s.target}: {num(s.ridge)}" for s in settings)


def kernel_names(manifest: dict) -> str | None:
    """The kernel families a version uses, in target order without repeats (``rbf`` or
    ``rbf, laplacian``); None when the manifest does not state them readably."""
    try:
        names = [tk.spec.name for tk in target_kernels(manifest)]
    except (KeyError, TypeError, ValueError, AttributeError):  # UserError is a ValueError
        return None
    return ", ".join(dict.fromkeys(names))


__all__ = ["TargetKernel", "kernel_groups", "kernel_names", "kernel_text", "ridge_text",
           "shared_entries", "target_kernels"]
