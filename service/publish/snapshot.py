"""The published serving model: what a scorer needs to answer ``/v1/score`` for one version.

A :class:`ServingSnapshot` holds the version (a publication number, strictly increasing per
channel), the journal position and update count it describes, the iterate scores come from, the
state digest, a summary of the certificate, the time it was taken, and the model state itself as
:meth:`models.LinearModel.scoring_bytes` writes it: both iterates' coefficients, the frozen scaling
(means and standard deviations of the numeric features) and the bucket layout (the spec: numeric
names, categorical names, ``hash_bits``). Decoding rebuilds a :class:`models.LinearModel`, so a
scorer scores with the very compiled scorer and feature mapping the learner uses: the scores of a
decoded snapshot are bit for bit the learner's own for that version (checked by
``tests/service/publish``).

Bytes layout (integers little-endian)::

    b"TRIMTAB-SERVING v1\\n"
    u64 meta length, meta (JSON): version, seq, updates, serving, digest, published_at, certificate
    the model state (models.snapshot layout, with its own SHA-256 trailer)

The model state's checksum covers every coefficient, so a damaged or torn copy is refused on
decoding (:class:`SnapshotDecodeFailed`), whatever the channel.
"""

from __future__ import annotations

import struct
import time
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import orjson

from models import LinearModel, TrimtabError
from models.features import Rows
from models.snapshot import unpack

__all__ = ["CERTIFICATE_FIELDS", "ServingSnapshot", "SnapshotDecodeFailed", "take_snapshot"]

MAGIC = b"TRIMTAB-SERVING v1\n"

#: the certificate fields a published model carries (the whole certificate is on the learner's model card)
CERTIFICATE_FIELDS = ("rule", "applicable", "bound", "T", "G", "G_estimated", "reason", "applies_from_event")


class SnapshotDecodeFailed(TrimtabError):
    """Bytes that are not a whole published model (wrong magic, truncated, checksum mismatch)."""


@dataclass
class ServingSnapshot:
    """One published version of the serving model.

    Attributes
    ----------
    version
        Publication number, strictly increasing along one channel.
    seq
        The learner's applied journal position when the model was taken.
    updates
        SGD updates of the model (``LinearModel.n_updates``).
    serving
        The iterate scores come from unless a request names one: ``"raw"`` or ``"averaged"``.
    digest
        The state digest (SHA-256 of the state, as on the model card's ``state_digest``).
    published_at
        Unix time the learner took the snapshot.
    certificate
        :data:`CERTIFICATE_FIELDS` of the learner's certificate for this state.
    state
        The model state (:meth:`models.LinearModel.scoring_bytes`); :attr:`model` decodes it.
    """

    version: int
    seq: int
    updates: int
    serving: str
    digest: str
    published_at: float
    certificate: dict
    state: bytes = field(repr=False)

    @cached_property
    def model(self) -> LinearModel:
        """The decoded model (once), for scoring; treat it as read-only."""
        try:
            return LinearModel.from_bytes(self.state)
        except (TrimtabError, ValueError, KeyError) as exc:
            raise SnapshotDecodeFailed(f"published model is damaged: {exc}") from None

    # ------------------------------------------------------------------ scoring
    def score(self, features: list[dict], iterate: str | None = None) -> tuple[np.ndarray, str]:
        """Predictions for validated feature dicts, and the iterate used (the serving one by default).

        The same calls as the learner's ``/v1/score``: the model's feature mapping without remembering
        new categorical values, then its compiled scorer; so the result is the learner's, bit for bit.
        """
        used = iterate or self.serving
        return self.model.predict_rows(self.model.rows(features, remember=False), used), used

    def score_rows(self, rows: Rows, iterate: str | None = None) -> np.ndarray:
        """Predictions for rows already mapped by this model's :attr:`LinearModel.mapper`."""
        return self.model.predict_rows(rows, iterate or self.serving)

    # ------------------------------------------------------------------ describing
    def describe(self, now: float | None = None) -> dict:
        """The version as JSON: what ``GET /v1/model/serving`` answers (no coefficients)."""
        now = time.time() if now is None else now
        spec = self.model.spec
        mean, std = self.model.scaling
        return {"version": self.version, "seq": self.seq, "updates": self.updates, "serving": self.serving,
                "state_digest": self.digest, "published_at": self.published_at,
                "age_s": max(0.0, now - self.published_at), "certificate": self.certificate,
                "layout": {"numeric": list(spec.numeric), "categorical": list(spec.categorical),
                           "hash_bits": spec.hash_bits, "dimension": self.model.dim},
                "scaling": {"frozen": self.model.scaling_frozen, "mean": mean.tolist(), "std": std.tolist()}}

    @property
    def answer_version(self) -> dict:
        """What a score answer names as its ``version``."""
        return {"published": self.version, "seq": self.seq, "updates": self.updates, "digest": self.digest}

    # ------------------------------------------------------------------ bytes
    def to_bytes(self) -> bytes:
        """The snapshot as bytes (the layout in the module docstring); :meth:`from_bytes` reverses it."""
        meta = orjson.dumps({"version": self.version, "seq": self.seq, "updates": self.updates,
                             "serving": self.serving, "digest": self.digest, "published_at": self.published_at,
                             "certificate": self.certificate})
        return b"".join((MAGIC, struct.pack("<Q", len(meta)), meta, self.state))

    @classmethod
    def from_bytes(cls, blob: bytes | memoryview) -> ServingSnapshot:
        """Decode :meth:`to_bytes`; raises :class:`SnapshotDecodeFailed` saying what is wrong."""
        blob = bytes(blob)
        if not blob.startswith(MAGIC):
            raise SnapshotDecodeFailed("not a published trimtab model (bad magic bytes)")
        pos = len(MAGIC)
        if len(blob) < pos + 8:
            raise SnapshotDecodeFailed("published model is truncated (no meta length)")
        (n,) = struct.unpack_from("<Q", blob, pos)
        pos += 8
        if len(blob) < pos + n:
            raise SnapshotDecodeFailed("published model is truncated (meta)")
        try:
            meta = orjson.loads(blob[pos:pos + n])
            snap = cls(version=int(meta["version"]), seq=int(meta["seq"]), updates=int(meta["updates"]),
                       serving=meta["serving"], digest=meta["digest"], published_at=float(meta["published_at"]),
                       certificate=meta["certificate"], state=blob[pos + n:])
        except (orjson.JSONDecodeError, ValueError, KeyError, TypeError) as exc:
            raise SnapshotDecodeFailed(f"published model's meta is damaged: {exc}") from None
        header, arrays, extra, digest = unpack_checked(snap.state)
        if digest != snap.digest:  # the state's own checksum passed: the meta must describe it
            raise SnapshotDecodeFailed("published model's digest does not match its state")
        try:
            snap.__dict__["model"] = LinearModel.from_parts(header, arrays, extra)  # the cached property's slot
        except (TrimtabError, ValueError, KeyError) as exc:
            raise SnapshotDecodeFailed(f"published model is damaged: {exc}") from None
        return snap


def take_snapshot(engine, seq: int, version: int) -> ServingSnapshot:
    """The engine's serving model as a snapshot with publication number ``version``.

    Call it where the engine's state is stable (under the ingestor's lock); the model is copied
    through its bytes, so the snapshot shares nothing with the engine afterwards (and is decoded
    only if :attr:`ServingSnapshot.model` is read).
    """
    model = engine.model
    state, digest = model.scoring_bytes()
    cert = engine.certificate()
    return ServingSnapshot(version=version, seq=seq, updates=model.n_updates, serving=engine.serving,
                           digest=digest, published_at=time.time(),
                           certificate={k: cert.get(k) for k in CERTIFICATE_FIELDS}, state=state)


def unpack_checked(state: bytes) -> tuple:
    """:func:`models.snapshot.unpack` with its refusals as :class:`SnapshotDecodeFailed`."""
    try:
        return unpack(state)
    except TrimtabError as exc:
        raise SnapshotDecodeFailed(f"published model is damaged: {exc}") from None

