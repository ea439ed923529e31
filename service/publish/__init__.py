"""Model publication: the learner hands its serving model to scorer processes.

* :mod:`service.publish.snapshot`: the published model (:class:`ServingSnapshot`), its bytes, and
  scoring with it (bit for bit the learner's own score for that version);
* :mod:`service.publish.channel`: the small interface a publication channel implements
  (:class:`SnapshotPublisher`, :class:`SnapshotReader`);
* :mod:`service.publish.shared`: the one-box channel, a shared-memory file with an atomic version swap.
"""

from service.publish.channel import SnapshotPublisher, SnapshotReader
from service.publish.snapshot import ServingSnapshot, SnapshotDecodeFailed, take_snapshot

__all__ = ["ServingSnapshot", "SnapshotDecodeFailed", "SnapshotPublisher", "SnapshotReader", "take_snapshot"]
