"""The publication channel across machines: the newest serving model in one Redis hash.

The learner writes, for the key ``[publish] key`` (default ``trimtab.<name>.model``), one hash:

========= ==============================================================================
field     holds
========= ==============================================================================
version   the publication number on this Redis server (``HINCRBY``: it continues across
          learner restarts, so it only goes up while the server keeps its data)
model     the snapshot's bytes (:meth:`ServingSnapshot.to_bytes`)
beat      the learner's clock (Unix microseconds) when it last confirmed, with nothing new to
          publish, that ``model`` is still its newest
========= ==============================================================================

One Lua script raises ``version``, stores ``model`` and publishes the new number on the pub/sub
channel ``<key>.published``; Redis runs a script as one step, and a reader takes ``version`` and
``model`` with one ``HMGET``, so no reader ever sees the number of one version with the bytes of
another (and the bytes carry their own checksum). The version a reader reports is the hash's
``version`` field, not the number inside the bytes: the learner's local channel numbers its own
publications, and Redis scorers on every machine must agree on one numbering.

The learner's end (:class:`RedisPublisher`) never waits on the network: :meth:`~RedisPublisher.publish`
leaves the snapshot in a one-place mailbox that a sender thread empties (a newer snapshot replaces
one not sent yet: readers may skip versions, never go back), reconnecting with a doubling wait when
the server is away. A scorer's end (:class:`RedisReader`) is synchronous and blocking; the remote
scorer (:mod:`service.http.remote_scorer`) runs it on its own thread.
"""

from __future__ import annotations

import logging
import threading
import time

from service.backoff import Backoff
from service.publish.snapshot import ServingSnapshot, SnapshotDecodeFailed

__all__ = ["RedisPublisher", "RedisReader", "channel_names"]

log = logging.getLogger("trimtab.publish")

_PUBLISH = """
local v = redis.call('HINCRBY', KEYS[1], 'version', 1)
redis.call('HSET', KEYS[1], 'model', ARGV[1])
redis.call('PUBLISH', KEYS[2], v)
return v
"""


def channel_names(key: str) -> tuple[str, str]:
    """The hash key and the pub/sub channel of a publication key."""
    return key, f"{key}.published"


class RedisPublisher:
    """The learner's end: sends the newest snapshot to Redis from a thread of its own.

    Parameters
    ----------
    url : str
        ``redis://`` address.
    key : str
        The hash that holds the newest model.
    heartbeat_s : float
        With nothing new to send for this long, write ``beat`` so that scorers know the learner is
        alive and their model is still its newest.
    reconnect_max_s : float
        Longest wait between reconnection attempts.
    """

    blocking = False

    def __init__(self, url: str, key: str, *, heartbeat_s: float = 1.0, reconnect_max_s: float = 5.0) -> None:
        import redis

        self.key, self.channel = channel_names(key)
        self.heartbeat_s = heartbeat_s
        self._client = redis.Redis.from_url(url, socket_timeout=10.0, socket_connect_timeout=5.0)
        self._script = self._client.register_script(_PUBLISH)
        self._backoff = Backoff(reconnect_max_s)
        self._cond = threading.Condition()
        self._mailbox: ServingSnapshot | None = None
        self._closed = False
        self._next = 1
        #: the newest publication number on the server, and the snapshot version it carried
        self.sent_version = 0
        self.sent_local = 0
        self.sends = self.failures = 0
        self.error: str | None = None
        self._thread = threading.Thread(target=self._run, name="trimtab-redis-publish", daemon=True)
        self._thread.start()

    def next_version(self) -> int:
        """This learner's own publication count plus one (Redis numbers its copies itself)."""
        return self._next

    def publish(self, snapshot: ServingSnapshot) -> None:
        """Leave ``snapshot`` for the sender thread (replacing one not sent yet); returns at once."""
        with self._cond:
            self._next = snapshot.version + 1
            self._mailbox = snapshot
            self._cond.notify()

    def flush(self, timeout: float = 10.0) -> bool:
        """Wait until the mailbox is empty (sent); ``False`` if that took longer than ``timeout``."""
        deadline = time.monotonic() + timeout
        with self._cond:
            while self._mailbox is not None and time.monotonic() < deadline:
                self._cond.wait(0.01)
            return self._mailbox is None

    def close(self) -> None:
        """Send what is in the mailbox (for up to 2 s), then stop the thread and the connection."""
        self.flush(2.0)
        with self._cond:
            self._closed = True
            self._cond.notify()
        self._thread.join(15)
        self._client.close()

    def _run(self) -> None:
        while True:
            with self._cond:
                if self._mailbox is None and not self._closed:
                    self._cond.wait(self.heartbeat_s)
                if self._closed:
                    return
                snap = self._mailbox
                if snap is None and self.sends == 0:
                    continue  # nothing of this run published yet: the model there is not vouched for
            try:
                if snap is None:
                    self._client.hset(self.key, "beat", int(time.time() * 1e6))
                else:
                    self.sent_version = int(self._script(keys=[self.key, self.channel], args=[snap.to_bytes()]))
                    self.sent_local = snap.version
                    self.sends += 1
                    with self._cond:
                        if self._mailbox is snap:  # not replaced meanwhile
                            self._mailbox = None
                        self._cond.notify_all()
                self._backoff.reset()
                self.error = None
            except Exception as exc:  # the server away: keep the newest snapshot and retry
                self.failures += 1
                self.error = f"{type(exc).__name__}: {exc}"
                wait = self._backoff.next_wait()
                log.warning("publishing to Redis %s: %s; retrying in %.2f s", self.key, self.error, wait)
                with self._cond:
                    if not self._closed:
                        self._cond.wait(wait)

    def redis_status(self) -> dict:
        """For the learner's ``/readyz``: what was sent, and the last failure if the server is away."""
        return {"key": self.key, "version": self.sent_version, "local_version": self.sent_local,
                "sends": self.sends, "failures": self.failures, "error": self.error}


class RedisReader:
    """A scorer's end: the newest model in the hash, and a wait for the next publication.

    Parameters
    ----------
    url : str
        ``redis://`` address.
    key : str
        The hash the learner writes.

    Raises ``redis.RedisError`` (a connection lost) from every method: the caller retries.
    """

    blocking = True

    def __init__(self, url: str, key: str) -> None:
        import redis

        self.key, self.channel = channel_names(key)
        self._client = redis.Redis.from_url(url, socket_timeout=10.0, socket_connect_timeout=5.0)
        self._pubsub = None
        #: copies refused because their bytes did not decode (each one re-read at the next check)
        self.refused = 0

    def version(self) -> int:
        """The newest publication number on the server (0: nothing published)."""
        return int(self._client.hget(self.key, "version") or 0)

    def signs(self) -> tuple[int, int]:
        """``(version, beat)`` in one round trip: what tells a scorer that the learner is alive."""
        v, beat = self._client.hmget(self.key, ["version", "beat"])
        return int(v or 0), int(beat or 0)

    def latest(self) -> ServingSnapshot | None:
        """The newest snapshot, its ``version`` set to the server's number; ``None`` if none, or if
        the copy did not decode (counted in :attr:`refused`; the caller keeps what it has)."""
        v, blob = self._client.hmget(self.key, ["version", "model"])
        if v is None or blob is None:
            return None
        try:
            snap = ServingSnapshot.from_bytes(blob)
            snap.model  # noqa: B018 (decode here, off the serving path, so damage shows now)
        except SnapshotDecodeFailed as exc:
            self.refused += 1
            log.warning("Redis %s version %s refused: %s", self.key, v, exc)
            return None
        snap.version = int(v)  # in place: the decoded model stays with it
        return snap

    def wait(self, timeout: float) -> bool:
        """Wait up to ``timeout`` seconds for a publication notice; ``True`` if one came.

        Notices are only a hint (pub/sub drops them while disconnected): callers check
        :meth:`signs` after every wait, notice or not.
        """
        if self._pubsub is None:
            self._pubsub = self._client.pubsub(ignore_subscribe_messages=True)
            self._pubsub.subscribe(self.channel)
        got = self._pubsub.get_message(timeout=timeout) is not None
        while got and self._pubsub.get_message(timeout=0) is not None:
            pass  # several notices at once: one check covers them
        return got

    def reset(self) -> None:
        """After a failure: drop the subscription (the next :meth:`wait` subscribes again)."""
        if self._pubsub is not None:
            try:
                self._pubsub.close()
            except Exception:  # already broken: nothing to release cleanly
                pass
            self._pubsub = None

    def close(self) -> None:
        self.reset()
        self._client.close()
