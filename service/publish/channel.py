"""The interface of a publication channel: how the learner's serving model reaches scorers.

A channel carries :class:`~service.publish.snapshot.ServingSnapshot` values from one learner (the
single writer) to any number of scorers. Two sides, each a small :class:`typing.Protocol`:

* the learner holds a :class:`SnapshotPublisher` and calls :meth:`~SnapshotPublisher.publish` with
  each new version (after every applied slice, at most every ``service.publish_every_ms``);
* a scorer holds a :class:`SnapshotReader`, checks :meth:`~SnapshotReader.version` (cheap: no
  decoding) and calls :meth:`~SnapshotReader.latest` when it went up.

What every channel guarantees:

1. versions are strictly increasing along a channel; a publisher that starts on a channel that
   already holds versions continues after the newest (:meth:`SnapshotPublisher.next_version`);
2. :meth:`SnapshotReader.latest` returns a whole snapshot exactly as published, or ``None`` when
   nothing was published yet, never a mix of two versions (torn or damaged bytes raise
   :class:`~service.publish.snapshot.SnapshotDecodeFailed` inside the channel, which retries or
   keeps the previous version);
3. a reader may skip versions (it sees the newest), never goes back to an older one.

The methods are synchronous. A channel whose methods wait on the network sets ``blocking = True``;
callers then run them on a worker thread, never on an event loop. The one-box channel
(:mod:`service.publish.shared`) does not block.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

from service.publish.snapshot import ServingSnapshot

__all__ = ["SnapshotPublisher", "SnapshotReader"]


@runtime_checkable
class SnapshotPublisher(Protocol):
    """The learner's end of a channel."""

    #: whether the methods wait on I/O (then call them off the event loop)
    blocking: bool

    def next_version(self) -> int:
        """The publication number the next snapshot must carry (1 on an empty channel)."""
        ...

    def publish(self, snapshot: ServingSnapshot) -> None:
        """Make ``snapshot`` the newest version; its ``version`` must be :meth:`next_version`."""
        ...

    def close(self) -> None:
        """Release the channel's resources (published versions stay readable where the channel keeps them)."""
        ...


@runtime_checkable
class SnapshotReader(Protocol):
    """A scorer's end of a channel."""

    #: whether the methods wait on I/O (then call them off the event loop)
    blocking: bool

    def version(self) -> int:
        """The newest published version number, 0 when none: cheap enough to call per request."""
        ...

    def latest(self) -> ServingSnapshot | None:
        """The newest whole snapshot, or ``None`` when nothing was published yet."""
        ...

    def close(self) -> None:
        """Release the channel's resources."""
        ...
