"""The online linear model: projected SGD with iterate averaging, one event at a time."""

from __future__ import annotations

import copy
import math

import numpy as np

from . import layout as K
from .native import MODEL as C
from .certificate import certificate
from .errors import InvalidInput, NonFiniteInput, SnapshotError
from .features import FeatureMapper, Rows
from .results import Outcome, WindowScores
from .snapshot import pack, unpack
from .spec import ModelSpec

__all__ = ["ITERATES", "LinearModel", "Outcome", "WindowScores"]

#: Names of the two iterates a model can score with.
ITERATES = {"raw": 0, "averaged": 1}


class LinearModel:
    """A linear model learned online by projected SGD, with an averaged iterate beside the raw one.

    Parameters
    ----------
    spec
        The settings (see :class:`ModelSpec`); keyword arguments build one when omitted.

    Examples
    --------
    >>> m = LinearModel(numeric=["x"], scaling="none", constraint="ball", radius=10.0, grad_bound=4.0)
    >>> m.score_one({"x": 1.0})
    0.0
    >>> for i in range(2000):
    ...     m.learn_one({"x": (i % 7) / 7.0}, 2.0 * (i % 7) / 7.0 + 1.0)
    >>> round(m.score_one({"x": 0.5}), 1)
    2.0
    """

    def __init__(self, spec: ModelSpec | None = None, **settings) -> None:
        self._spec = spec if spec is not None else ModelSpec(**settings)
        spec = self._spec
        self._mapper = FeatureMapper(spec.numeric, spec.categorical, spec.hash_bits)
        self._prm = spec.kernel_params()
        self._lazy = spec.kernel == "lazy"
        d = spec.dim()
        # column 0: the raw coefficients (lazy: v with w = a v), column 1: the averaging accumulator
        # (lazy: U; dense: the average); interleaved so an event touches one cache line per coordinate
        self._st = np.zeros((d, 2))
        self._sc = np.zeros(K.N_SCALARS)
        self._sc[[K.S_A, K.S_CEXP, K.S_STEPSCALE]] = 1.0
        n = len(spec.numeric)
        self._mean = np.zeros(n)
        self._std = np.ones(n)
        self._frozen = spec.scaling == "none"
        self._warm: list[tuple[np.ndarray, np.ndarray, float]] = []
        self._xs = np.zeros(8)
        self._cand = np.zeros(d if not self._lazy else 8)

    # ------------------------------------------------------------------ read-only views
    @property
    def spec(self) -> ModelSpec:
        return self._spec

    @property
    def mapper(self) -> FeatureMapper:
        return self._mapper

    @property
    def dim(self) -> int:
        return self._st.shape[0]

    def kernel_state(self) -> tuple[bool, np.ndarray, np.ndarray]:
        """``(lazy, state, scalars)``: the learned arrays themselves (not copies), for compiled
        readers that score many rows with both iterates without building either vector (see
        ``kernels.pair_margins`` and ``kernels.margin_map``). Callers must not write to them."""
        return self._lazy, self._st, self._sc

    @property
    def n_updates(self) -> int:
        """Updates applied since the model was created."""
        return int(self._sc[K.S_NUPD])

    @property
    def updates_since_restart(self) -> int:
        return int(self._sc[K.S_TAVG])

    @property
    def step_scale(self) -> float:
        """Product of the rollback shrink factors applied to every step since the last restart."""
        return float(self._sc[K.S_STEPSCALE])

    @property
    def last_step(self) -> float:
        return float(self._sc[K.S_LASTETA])

    @property
    def refused(self) -> int:
        """Updates refused because they would have made the state non-finite."""
        return int(self._sc[K.S_REFUSED])

    @property
    def grad_bound(self) -> float | None:
        """``G`` in use: the given bound, or the root mean square of the gradients seen."""
        if self._spec.grad_bound is not None:
            return float(self._spec.grad_bound)
        n = self._sc[K.S_GN]
        return float(math.sqrt(self._sc[K.S_GSQ] / n)) if n > 0 else None

    @property
    def scaling_frozen(self) -> bool:
        return self._frozen

    @property
    def scaling(self) -> tuple[np.ndarray, np.ndarray]:
        """Mean and standard deviation of the numeric features (copies)."""
        return self._mean.copy(), self._std.copy()

    # ------------------------------------------------------------------ mapping and validation
    def rows(self, features, where: str = "", remember: bool = True) -> Rows:
        """Map feature dicts to :class:`Rows` (raises :class:`NonFiniteInput` naming the feature);
        ``remember=False`` for rows that are only scored (new categorical values are not kept)."""
        return self._mapper.map(features, where=where, remember=remember)

    def check_targets(self, targets, where: str = "") -> np.ndarray:
        """Targets as float64; raise naming the index if one is non-finite or not 0/1 for binary."""
        y = np.asarray(targets, dtype=np.float64).reshape(-1)
        bad = ~np.isfinite(y)
        if bad.any():
            i = int(np.argmax(bad))
            raise NonFiniteInput(f"target is not a finite number: {y[i]!r}", where=f"{where}[{i}].target")
        if self._spec.task == "binary":
            bad = (y != 0.0) & (y != 1.0)
            if bad.any():
                i = int(np.argmax(bad))
                raise InvalidInput(f"binary target must be 0 or 1, got {y[i]!r}", where=f"{where}[{i}].target")
        return y

    # ------------------------------------------------------------------ scoring
    def score_rows(self, rows: Rows, iterate: str = "averaged") -> np.ndarray:
        """Margins (scores before the link) of ``rows`` with the raw or averaged iterate.

        One compiled scorer serves both this and :meth:`score_rows_both` (computing the other
        iterate's margin costs a few additions per feature; one fewer kernel to compile on a first run).
        """
        return self.score_rows_both(rows)[_iterate(iterate)]

    def score_rows_both(self, rows: Rows) -> np.ndarray:
        """Margins of ``rows`` with both iterates, in one pass: row 0 raw, row 1 averaged."""
        out = np.zeros((2, len(rows)))
        C.score_rows_both(self._lazy, self._st, self._sc, self._prm, self._mean, self._std,
                          rows.indptr, rows.indices, rows.values, out)
        return out

    def score_window(self, rows: Rows, y: np.ndarray, n_ref: int, sample_max: int, absurd: float,
                     new_from: int | None = None, scaled: tuple | None = None) -> WindowScores:
        """The held-out monitor's figures of ``rows`` (targets ``y``) in one compiled pass
        (``readouts.score_window``; its docstring defines them), for the rows from ``new_from`` on (none:
        no row) whether each is above the reference, and the distance between the iterates.

        ``scaled``: ``(buffer, done, scale)`` kept by the caller between calls on the same rows: a float
        buffer as long as ``rows.values`` that holds, for the first ``done`` rows, their values as this
        model scales them, and ``scale`` (``2 * len(numeric)`` floats) the means and standard deviations
        they were scaled with. Rows scaled with other ones are scaled again; on return every row's scaled
        values are in the buffer and ``scale`` holds this model's. The figures are the same with or
        without it."""
        n = len(rows)
        if scaled is None:
            scaled = (np.empty(len(rows.values)), 0, np.empty(0))
        losses, usable = np.empty((2, n)), np.empty(n, dtype=np.bool_)
        above = np.empty(n - (n if new_from is None else new_from))
        reference, n_usable, raw_sum, avg_sum, n_above, distance = C.score_window(
            self._lazy, self._st, self._sc, self._prm, self._mean, self._std, rows.indptr, rows.indices,
            rows.values, *scaled, y, n_ref, sample_max, absurd, losses, usable, above)
        return WindowScores(losses, usable, (raw_sum, avg_sum), n_usable, reference, above, n_above, distance)

    def predict_rows(self, rows: Rows, iterate: str = "averaged") -> np.ndarray:
        """Predictions of ``rows``: the score for regression, ``P(y = 1)`` for binary tasks."""
        m = self.score_rows(rows, iterate)
        return 0.5 * (1.0 + np.tanh(0.5 * m)) if self._spec.task == "binary" else m

    def score_many(self, features, iterate: str = "averaged") -> np.ndarray:
        return self.predict_rows(self.rows(features), iterate)

    def score_one(self, features: dict, iterate: str = "averaged") -> float:
        return float(self.score_many([features], iterate)[0])

    # ------------------------------------------------------------------ learning
    def learn_one(self, features: dict, target) -> None:
        """Learn one event; the state is unchanged if the features or target are not finite."""
        self.learn_many([features], [target])

    def learn_many(self, features, targets, serve: str = "raw") -> Outcome:
        """Learn events in order, with the same result as calling :meth:`learn_one` on each."""
        features = list(features)
        y = self.check_targets(targets)
        if len(y) != len(features):
            raise InvalidInput(f"{len(features)} feature rows but {len(y)} targets")
        rows = self.rows(features)
        out = Outcome.empty(len(y))
        self.process(rows, y, np.ones(len(y), dtype=np.int8), out, serve=serve)
        return out

    def process(self, rows: Rows, y: np.ndarray, mode: np.ndarray, out: Outcome, *, serve: str = "averaged",
                start: int = 0, stop: int | None = None, max_learn: int | None = None) -> int:
        """Score, then learn, events ``start..stop`` in order; the engine's primitive.

        ``mode[i]`` is 0 to score only, 1 to score and learn, 2 to score and record the loss without
        learning. Stops after ``max_learn`` learning events; returns the index of the next event.
        The inputs are trusted (validated by :meth:`rows` and :meth:`check_targets`).
        """
        stop = len(rows) if stop is None else stop
        budget = (stop - start) if max_learn is None else max_learn
        learned = 0
        i = start
        serve_code = _iterate(serve)
        while i < stop and learned < budget:
            if not self._frozen:
                # warm-up: score the event alone, buffer it instead of learning (zero-copy views)
                learn = mode[i] == 1
                one = Rows(rows.indptr[i:i + 2], rows.indices, rows.values)
                view = Outcome(out.pred[i:i + 1], out.loss[i:i + 1], out.code[i:i + 1])
                self._run(one, y[i:i + 1], np.array([2 if learn else mode[i]], np.int8), serve_code, view, 0, 1, 1)
                if learn:
                    lo, hi = rows.indptr[i], rows.indptr[i + 1]
                    self._warm.append((rows.indices[lo:hi].copy(), rows.values[lo:hi].copy(), float(y[i])))
                    out.code[i] = K.LEARNED
                    learned += 1
                    if len(self._warm) >= self._spec.warmup_events:
                        self._freeze()
                i += 1
                continue
            nxt = self._run(rows, y, mode, serve_code, out, i, stop, budget - learned)
            learned += int(np.count_nonzero(mode[i:nxt] == 1))
            i = nxt
        return i

    def _run(self, rows, y, mode, serve_code, out, start, stop, max_learn):
        """One call of the compiled kernel (scratch buffers grown to the batch's widest row first)."""
        ip = rows.indptr
        width = rows.width()  # of the whole batch, once: the engine calls this once per check segment
        if width > self._xs.shape[0]:
            self._xs = np.zeros(2 * width)
        if self._lazy and width > self._cand.shape[0]:
            self._cand = np.zeros(2 * width)
        fn = C.lazy_process if self._lazy else C.dense_process
        return fn(self._st, self._sc, self._prm, self._mean, self._std, ip, rows.indices,
                  rows.values, y, mode, serve_code, out.pred, out.loss, out.code, start, stop, max_learn,
                  self._xs, self._cand)

    def _freeze(self) -> None:
        """Freeze the warm-up scaling and learn the buffered events with it."""
        n = len(self._spec.numeric)
        idx = np.concatenate([w[0] for w in self._warm])
        val = np.concatenate([w[1] for w in self._warm])
        num = idx < n
        counts = np.bincount(idx[num], minlength=n).astype(np.float64)
        sums = np.bincount(idx[num], weights=val[num], minlength=n)
        mean = np.divide(sums, counts, out=np.zeros(n), where=counts > 0)
        sq = np.bincount(idx[num], weights=(val[num] - mean[idx[num]]) ** 2, minlength=n)
        std = np.sqrt(np.divide(sq, counts, out=np.zeros(n), where=counts > 0))
        std[~(std > 1e-12)] = 1.0
        self._mean, self._std = mean, std
        self._frozen = True
        warm, self._warm = self._warm, []
        rows = Rows(np.concatenate([[0], np.cumsum([len(w[0]) for w in warm])]).astype(np.int64), idx, val)
        y = np.array([w[2] for w in warm])
        self._run(rows, y, np.ones(len(warm), np.int8), 0, Outcome.empty(len(warm)), 0, len(warm), len(warm))

    # ------------------------------------------------------------------ iterates and operator actions
    def weights(self, iterate: str = "averaged") -> tuple[np.ndarray, float]:
        """Coefficients in the model's (scaled) coordinates and the intercept, as a copy."""
        out = np.zeros(self.dim)
        b = C.materialize(self._lazy, self._st, self._sc, _iterate(iterate), out)
        return out, float(b)

    def distance(self) -> float:
        """Euclidean distance between the raw and the averaged iterate (intercept included)."""
        return float(C.iterate_distance(self._lazy, self._st, self._sc))

    def raw_norm(self) -> float:
        """``||(w_raw, b_raw)||`` without a pass over the coefficients where the lazy state keeps it
        (``a**2 ||v||**2 + b**2``, the quantity the ball projection bounds)."""
        if not self._lazy:
            return self.norm("raw")
        sc = self._sc
        return float(math.sqrt(sc[K.S_A] ** 2 * sc[K.S_NV2] + sc[K.S_B] ** 2))

    def norm(self, iterate: str = "raw") -> float:
        w, b = self.weights(iterate)
        return float(math.sqrt(np.dot(w, w) + b * b))

    def rollback(self, shrink: float = 0.5) -> None:
        """Set the raw iterate to the averaged one and multiply later steps by ``shrink``.

        Afterwards ``weights("raw")`` and ``weights("averaged")`` are bit-identical (up to the sign of
        zeros) and learning continues from there; the averaging history is kept.
        """
        if not 0.0 < shrink <= 1.0:
            raise ValueError("shrink must be in (0, 1]")
        sc = self._sc
        if sc[K.S_Z] > 0.0:
            if self._lazy:
                C.lazy_rebase(self._st, sc)
            w, b = self.weights("averaged")
            self._st[:, 0] = w
            sc[K.S_B] = b
            sc[K.S_NV2] = float(np.dot(w, w))
        sc[K.S_STEPSCALE] *= shrink

    def restart(self) -> None:
        """Forget the average, re-warm the step schedule and re-estimate ``G`` (after a real change).

        The raw iterate is kept: it is the best guess at the new optimum, and the averaging starts
        again from it. A rollback keeps the average and distrusts the raw iterate; a restart keeps
        the raw iterate and distrusts the average.
        """
        sc = self._sc
        if self._lazy:
            C.lazy_rebase(self._st, sc)
        self._st[:, 1] = 0.0
        for s in (K.S_ACC, K.S_Z, K.S_SB, K.S_TAVG, K.S_TSTEP, K.S_GSQ, K.S_GN):
            sc[s] = 0.0
        sc[K.S_CEXP] = 1.0
        sc[K.S_STEPSCALE] = 1.0

    def certificate(self, restarted_at: int | None = None) -> dict:
        """The certificate (``models.certificate``); ``restarted_at``: the event of the last restart."""
        return certificate(self._spec, self.updates_since_restart, self.grad_bound,
                           grad_estimated=self._spec.grad_bound is None, step_scale=self.step_scale,
                           restarted_at=restarted_at)

    def coefficients(self, iterate: str = "averaged") -> dict:
        """Intercept and coefficients in the features' own units (the warm-up scaling undone).

        Categorical coefficients are listed per value seen (up to 65,536 values); two values that
        share a hash bucket share its coefficient (with their signs).
        """
        w, b = self.weights(iterate)
        n = len(self._spec.numeric)
        coef = w[:n] / self._std
        intercept = b - float(np.dot(coef, self._mean))
        cats: dict[str, dict[str, float]] = {name: {} for name in self._spec.categorical}
        for (name, text), (j, sign) in self._mapper.known_values().items():
            cats[name][text] = float(sign * w[j])
        return {"iterate": iterate, "intercept": float(intercept),
                "numeric": {name: float(c) for name, c in zip(self._spec.numeric, coef)},
                "categorical": cats}

    # ------------------------------------------------------------------ snapshots
    def _arrays(self) -> dict[str, np.ndarray]:
        warm = self._warm
        return {
            "state": self._st, "sc": self._sc, "mean": self._mean, "std": self._std,
            "warm_len": np.array([len(w[0]) for w in warm], dtype=np.int64),
            "warm_idx": np.concatenate([w[0] for w in warm]) if warm else np.zeros(0, np.int64),
            "warm_val": np.concatenate([w[1] for w in warm]) if warm else np.zeros(0),
            "warm_y": np.array([w[2] for w in warm], dtype=np.float64),
        }

    def _pack(self, categories: bool = True) -> tuple[bytes, str]:
        header = {"format": "linear-model", "spec": self._spec.to_dict(), "frozen": self._frozen}
        extra = {"categories": [[n, t, j, s] for (n, t), (j, s) in self._mapper.known_values().items()]
                 if categories else []}
        return pack(header, self._arrays(), extra)

    def scoring_bytes(self) -> tuple[bytes, str]:
        """``(blob, state digest)``: the state as :meth:`to_bytes` without the categorical values seen
        (reporting only: scoring hashes values and needs no memory of them). :meth:`from_bytes` of the
        blob scores bit for bit as this model, and its digest is this model's :attr:`digest`."""
        return self._pack(categories=False)

    def to_bytes(self) -> bytes:
        """The whole state as bytes; :meth:`from_bytes` gives back a bit-identical model."""
        return self._pack()[0]

    @property
    def digest(self) -> str:
        """SHA-256 of the serialized state: equal digests mean bit-identical models."""
        return self._pack()[1]

    @classmethod
    def from_bytes(cls, blob: bytes) -> LinearModel:
        header, arrays, extra, _ = unpack(blob)
        return cls.from_parts(header, arrays, extra)

    @classmethod
    def from_parts(cls, header: dict, arrays: dict, extra: dict) -> LinearModel:
        """The model from the parts :func:`models.snapshot.unpack` returns (for a caller that also
        wants the digest it computes: one pass over the bytes instead of two)."""
        if header.get("format") != "linear-model":
            raise SnapshotError("the state is not a linear model")
        model = cls(ModelSpec.from_dict(header["spec"]))
        for name, attr in (("state", "_st"), ("sc", "_sc"), ("mean", "_mean"), ("std", "_std")):
            want = getattr(model, attr)
            if arrays[name].size != want.size:
                raise SnapshotError(f"array {name!r} has the wrong size for this spec")
            setattr(model, attr, arrays[name].reshape(want.shape))
        model._frozen = bool(header["frozen"])
        bounds = np.concatenate([[0], np.cumsum(arrays["warm_len"])])
        model._warm = [(arrays["warm_idx"][bounds[k]:bounds[k + 1]], arrays["warm_val"][bounds[k]:bounds[k + 1]],
                        float(arrays["warm_y"][k])) for k in range(len(arrays["warm_len"]))]
        for name, text, j, sign in extra.get("categories", []):
            model._mapper._cache[(name, text)] = (int(j), float(sign))
        return model

    def copy(self) -> LinearModel:
        """An independent copy with the same state."""
        return LinearModel.from_bytes(self.to_bytes())

    def quick_copy(self) -> LinearModel:
        """An independent copy in a few microseconds (the monitor's trusted copy): the learned state lives
        in numpy arrays, which are copied; the frozen spec and the mapper's cache of names are shared."""
        twin = copy.copy(self)
        for name, value in vars(self).items():
            if isinstance(value, np.ndarray):
                setattr(twin, name, value.copy())
        twin._warm = list(self._warm)
        return twin

    def clone(self) -> LinearModel:
        """A fresh model with the same settings and no learned state."""
        return LinearModel(self._spec)

    def __repr__(self) -> str:
        return f"LinearModel(loss={self._spec.loss!r}, rule={self._spec.rule!r}, updates={self.n_updates})"


def _iterate(name: str) -> int:
    try:
        return ITERATES[name]
    except KeyError:
        raise ValueError(f"Invalid iterate {name!r}. Valid values are: averaged, raw") from None
