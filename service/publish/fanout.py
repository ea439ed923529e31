"""One learner, several publication channels: the local one for scorer processes on this machine
and Redis for scorers on others (``[publish]``), fed the same snapshots.

The local channel numbers the versions (:meth:`FanOut.next_version` is its own); the Redis channel
numbers its copies itself (:mod:`service.publish.redis_channel`), so each channel's readers see
strictly increasing numbers whatever the other does.
"""

from __future__ import annotations

from service.publish.snapshot import ServingSnapshot

__all__ = ["FanOut", "publisher_for"]


class FanOut:
    """A :class:`~service.publish.SnapshotPublisher` that hands each snapshot to every channel in order.

    Parameters
    ----------
    channels : list
        Publishers; the first one numbers the versions.
    """

    def __init__(self, channels: list) -> None:
        self.channels = channels
        self.blocking = any(c.blocking for c in channels)

    def next_version(self) -> int:
        return self.channels[0].next_version()

    def publish(self, snapshot: ServingSnapshot) -> None:
        for c in self.channels:
            c.publish(snapshot)

    def close(self) -> None:
        for c in self.channels:
            c.close()

    def redis_status(self) -> dict | None:
        """The Redis channel's :meth:`~service.publish.redis_channel.RedisPublisher.redis_status`, if any."""
        for c in self.channels:
            if hasattr(c, "redis_status"):
                return c.redis_status()
        return None


def publisher_for(local, config):
    """What the learner publishes to: ``local`` (or ``None``) alone without ``[publish]``; with it, a
    :class:`~service.publish.redis_channel.RedisPublisher` alone or after ``local``."""
    if config.publish is None:
        return local
    from service.publish.redis_channel import RedisPublisher

    pub = config.publish
    remote = RedisPublisher(pub.source, config.publish_key(), heartbeat_s=min(1.0, pub.max_model_age_s / 4),
                            reconnect_max_s=pub.reconnect_max_s)
    return remote if local is None else FanOut([local, remote])
