"""A loaded, verified model version: the object behind ``load_model``.

Prediction in raw units is f(x) = k(s(x), X_s)·α + mean, where s is the stored
standardization (README, "Concepts"). Arrays are read into the process and checksummed
there (:mod:`service.store.arrays`): what is served is what was verified.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import NamedTuple

import numpy as np

from service import envelope, intervals, pca_domain, target_bounds
from service.categories import Categories, flag_new
from service.engine_groups import engine_for
from service.intervals import check_coverage
from service.store import Store, StoreError
from service.target_kernels import target_kernels

#: Serving precisions a manifest (and ``kridge train --precision``) may name.
PRECISIONS = ("float64", "float32")


#: Batches up to this many values are screened for non-finite values by one dot product.
_SCREEN = 4096
_ZEROS = np.zeros(_SCREEN)
_ZEROS.flags.writeable = False


def check_precision(precision: str) -> str:
    """``precision`` if it is one of :data:`PRECISIONS`, else ValueError."""
    if precision not in PRECISIONS:
        raise ValueError(f"precision must be float64 or float32, not {precision!r}")
    return precision


class Scored(NamedTuple):
    """What :meth:`Model.answer` gives for a batch: (m, t) values, the envelope per row, and
    the (m, t) interval ends when half-widths were given (None otherwise)."""

    values: np.ndarray
    envelope: list[dict]
    lower: np.ndarray | None
    upper: np.ndarray | None


class Model:
    """One version of one model, verified and ready to predict.

    Attributes
    ----------
    name, version, manifest : identity and the full manifest.
    features : feature names in the order ``predict`` expects.
    columns : the encoded columns of the model's arrays: ``features``, with each text
        feature replaced by its one-hot columns (:mod:`service.categories`).
    targets : target names; ``predict`` returns one column per target when there are several.
    target_kernels : each target's kernel and ridge (:mod:`service.target_kernels`).
    spec : the first target's kernel (every target's, unless the manifest gives targets
        kernels of their own).
    """

    def __init__(self, manifest: dict, arrays: dict[str, np.ndarray]):
        self.manifest = manifest
        self.name: str = manifest["model"]
        self.version: int = int(manifest["version"])
        self.features: list[str] = list(manifest["features"])
        self.targets: list[str] = list(manifest["targets"])
        std = manifest["standardization"]
        self.mean = np.asarray(std["mean"], dtype=np.float64)
        self.scale = np.asarray(std["scale"], dtype=np.float64)
        self.intercept = np.asarray(manifest["intercept"], dtype=np.float64)
        self.target_kernels = target_kernels(manifest)
        specs = [tk.spec for tk in self.target_kernels]
        self.spec = specs[0]
        precision = check_precision(manifest.get("precision", "float64"))
        env = manifest["envelope"]
        self.encoding = Categories(self.features, manifest.get("categories"))
        self.columns: list[str] = self.encoding.columns
        numbers = self.encoding.number_mask()  # one-hot columns have no range to leave
        self.lo = np.array([env["ranges"][f]["min"] if n else -np.inf
                            for f, n in zip(self.columns, numbers, strict=True)])
        self.hi = np.array([env["ranges"][f]["max"] if n else np.inf
                            for f, n in zip(self.columns, numbers, strict=True)])
        nov = env["novelty"]
        self.novelty_tau = float(nov["threshold_distance"])
        self.neighbours = envelope.NeighbourIndex(arrays["novelty_reference"], int(nov["k"]))
        #: standardized training rows (all, or a uniform sample): the drift check's reference
        self.reference: np.ndarray = arrays["novelty_reference"]
        # reference rows that are training rows: their distances come with the prediction
        shared = None
        if any(s.uses == "sqdist" for s in specs) and precision == "float64":
            shared = envelope.rows_within(arrays["novelty_reference"], arrays["x_train"])
        # one kernel evaluation per distinct kernel (service.engine_groups)
        self.engine = engine_for(specs, arrays["x_train"], arrays["dual"], dtype=precision,
                                 neighbours=None if shared is None else (shared,
                                                                         int(nov["k"])),
                                 shift=self.mean, scale=self.scale, offset=self.intercept)
        self.residuals = arrays.get("abs_residuals")  # sorted, (c, t); None: no intervals
        # checks and bounds that older versions do not store: None, and simply not made
        self.pca = pca_domain.from_bundle(env.get("pca"), arrays, self.mean, self.scale)
        ranges = env.get("target_ranges")
        self.y_lo = self.y_hi = None
        if ranges:
            self.y_lo = np.array([ranges[t]["min"] for t in self.targets])
            self.y_hi = np.array([ranges[t]["max"] for t in self.targets])
        self.bounds = target_bounds.from_manifest(manifest, self.targets)

    # -- numbers -------------------------------------------------------------------------
    def standardize(self, x: np.ndarray) -> np.ndarray:
        """s(x) = (x − mean) / scale with the training statistics."""
        return (x - self.mean) / self.scale

    def predict(self, x) -> np.ndarray:
        """Raw-unit predictions for raw rows ``x`` (m, d) in ``features`` order.

        With text features (:attr:`encoding`), pass rows as a sequence of rows or an object
        array: each text feature's value its category as a string, the others numbers; a
        category never seen in training encodes as all zeros (:meth:`score_rows` flags it).
        Returns (m,) for one target, (m, t) for several.
        """
        if self.encoding.any:
            x = self.encoding.encode(list(x))[0]
        y = self.engine.predict(self._check(x), raw=True)
        if self.bounds is not None:
            self.bounds.clip(y)
        return y[:, 0] if y.shape[1] == 1 else y

    def predict_standardized(self, xs: np.ndarray) -> np.ndarray:
        """(m, t) predictions for rows already standardized (service path, no re-checks)."""
        return self.engine.predict(xs) + self.intercept

    def score_rows(self, rows) -> tuple[np.ndarray, list[dict]]:
        """:meth:`score` of raw rows in ``features`` order, text features as strings
        (:meth:`answer_rows` without intervals)."""
        scored = self.answer_rows(rows)
        return scored.values, scored.envelope

    def score(self, x: np.ndarray) -> tuple[np.ndarray, list[dict]]:
        """Raw rows ``x`` (m, D) in :attr:`columns` order, already checked, → ((m, t)
        predictions, envelope per row) (:meth:`answer` without intervals)."""
        scored = self.answer(x)
        return scored.values, scored.envelope

    def answer_rows(self, rows, half: np.ndarray | None = None) -> Scored:
        """:meth:`answer` of raw rows in ``features`` order, text features as strings; a
        category never seen in training puts its row outside the envelope (ValueError for a
        value of the wrong kind, naming row and feature)."""
        x, unseen = self.encoding.encode(rows)
        scored = self.answer(self._check(x), half)
        flag_new(scored.envelope, unseen)
        return scored

    def answer(self, x: np.ndarray, half: np.ndarray | None = None) -> Scored:
        """Raw rows ``x`` (m, D) in :attr:`columns` order, already checked → predictions,
        envelope per row and, with the interval half-widths ``half`` (t,), the interval ends.

        The one path from rows to answers (the service and ``kridge predict`` both use it).
        When the novelty reference rows are training rows (distance kernels), their
        distances come out of the prediction's own product instead of a second one. The
        target-range check reads the unclipped predictions. With target bounds
        (:mod:`service.target_bounds`) the predictions and both interval ends are clipped
        to them; the interval is the unclipped ŷ ± h clipped, so whatever it covered of
        the possible values it still covers.
        """
        if self.engine.gives_neighbours:
            score = np.empty(x.shape[0])
            y = self.engine.predict(x, near=score, raw=True)
            score /= self.novelty_tau
        else:
            y = self.engine.predict(x, raw=True)
            score = self.novelty(self.standardize(x))
        outside = envelope.check_ranges(x, self.lo, self.hi)
        env = envelope.describe(x, outside, score, self.columns, self.lo, self.hi,
                                self.domain_checks(x, y))
        lower = upper = None
        if half is not None:
            lower, upper = y - half, y + half
        if self.bounds is not None:
            for part in (y, lower, upper):
                if part is not None:
                    self.bounds.clip(part)
        return Scored(y, env, lower, upper)

    def domain_checks(self, x: np.ndarray, y: np.ndarray | None) -> envelope.DomainChecks:
        """T² and Q ratios of raw rows ``x`` and, with the unclipped predictions ``y``, the
        target-range check; each left out when the version stores none."""
        t2, q = (None, None) if self.pca is None else self.pca.ratios(x)
        if y is None or self.y_lo is None:
            return envelope.DomainChecks(t2, q)
        return envelope.DomainChecks(t2, q, y, self.targets, self.y_lo, self.y_hi)

    def novelty(self, xs: np.ndarray) -> np.ndarray:
        """Novelty score of standardized rows: k-th neighbour distance / τ (see envelope)."""
        return self.neighbours.distances(xs) / self.novelty_tau

    def envelope(self, x, xs: np.ndarray | None = None) -> list[dict]:
        """Envelope report per row from the inputs alone (no target-range check: that needs
        the prediction, which :meth:`score` gives)."""
        x = np.asarray(x, dtype=np.float64)
        xs = self.standardize(x) if xs is None else xs
        outside = envelope.check_ranges(x, self.lo, self.hi)
        return envelope.describe(x, outside, self.novelty(xs), self.columns, self.lo, self.hi,
                                 self.domain_checks(x, None))

    def low_row(self) -> np.ndarray:
        """(1, D): every feature at its training minimum, one-hot columns at 0 (a probe)."""
        return np.where(np.isfinite(self.lo), self.lo, 0.0)[None, :]

    @property
    def has_intervals(self) -> bool:
        return self.residuals is not None

    def half_width(self, coverage: float) -> np.ndarray:
        """Interval half-width per target for a nominal ``coverage``.

        The ⌈(c+1)·coverage⌉-th smallest of the c calibration residuals |r|
        (:mod:`service.intervals`). :class:`~service.intervals.CoverageUnavailable` when the
        model has no calibration or c is too small for ``coverage``.
        """
        return intervals.bounded_half_width(self.residuals, coverage,
                                            f"{self.name} v{self.version}")

    def _check(self, x) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        shape = x.shape
        if len(shape) == 1 and len(self.columns) == 1:
            x = x[:, None]
            shape = x.shape
        if len(shape) != 2 or shape[1] != len(self.columns):
            raise ValueError(
                f"expected rows of {len(self.columns)} features ({', '.join(self.columns)}), "
                f"got shape {x.shape}"
            )
        # 0·v is 0 for every finite v and NaN for ±inf and NaN: one dot product (~0.5 µs)
        # screens a small batch, where isfinite(x).all() costs three times as much
        if x.size <= _SCREEN and math.isfinite(np.dot(x.reshape(-1), _ZEROS[: x.size])):
            return x
        if not np.isfinite(x).all():
            i, j = np.argwhere(~np.isfinite(x))[0]
            raise ValueError(f"row {i}, feature {self.columns[j]!r}: value is not finite")
        return x


def load_model(store=None, name: str | None = None, version: int | None = None) -> Model:
    """Load and verify one model version (the live one when ``version`` is None).

    ``store`` is a path (or a :class:`Store`); None means env ``KRIDGE_STORE`` or
    ``./kridge-store``. Every array's sha256 is checked before use; object arrays are refused.
    """
    if name is None:
        raise TypeError("load_model needs a model name")
    st = store if isinstance(store, Store) else Store(store)
    if version is None:
        version = st.live_version(name)
        if version is None:
            st.versions(name)  # NotFound when the model does not exist at all
            raise StoreError(f"model {name!r} has no live version; release one first")
    manifest = st.read_manifest(name, version)
    arrays = st.load_arrays(name, version, manifest)
    if int(manifest.get("version", -1)) != int(version) or manifest.get("model") != name:
        raise StoreError(f"{name} v{version}: manifest names another model or version")
    try:
        return Model(manifest, arrays)
    except (KeyError, TypeError, ValueError) as exc:
        raise StoreError(f"{name} v{version}: manifest is incomplete ({exc})") from exc


def verify(store, name: str, version: int) -> Model:
    """Raise :class:`StoreError` naming the fault unless the version loads and predicts."""
    model = load_model(store, name, version)
    probe = model.standardize(model.low_row())
    if not np.isfinite(model.predict_standardized(probe)).all():
        raise StoreError(f"{name} v{version}: predictions are not finite")
    return model


def verifier(store, name: str) -> Callable[[int], None]:
    """The check a release or rollback of ``name`` runs first: :func:`verify` the version."""

    def check(version: int) -> None:
        verify(store, name, version)

    return check


__all__ = ["PRECISIONS", "Model", "check_coverage", "check_precision", "load_model", "verify",
           "verifier"]
