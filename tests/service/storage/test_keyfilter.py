"""The Bloom filter in front of the deduplication index: never a false negative (a duplicate always
reaches the index), false positives at the rate Bloom's estimate gives, and ``Journal.known``
answering exactly as a Python set of every committed id would."""

from __future__ import annotations

import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.storage import keyfilter, seen
from service.storage.journal import Journal
from service.storage.keyfilter import KeyFilter
from service.storage.seen import id_key, number_events

ids = st.text(min_size=1, max_size=12)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(ids, max_size=300), st.lists(ids, max_size=300))
def test_an_added_key_is_always_reported(monkeypatch_bits, added, queried):
    """With a tiny filter (many collisions) every added key still reads as maybe seen."""
    f = KeyFilter()
    keys = [id_key(i) for i in added]
    f.add(keys)
    got = f.maybe(keys + [id_key(i) for i in queried])
    assert got[:len(keys)].all()
    assert f.count == len(keys)


@pytest.fixture
def monkeypatch_bits(monkeypatch):
    monkeypatch.setattr(keyfilter, "MIN_BITS", 256)  # 256 bits: collisions on purpose
    return 256


def test_false_positive_rate_matches_blooms_estimate(monkeypatch):
    """Bloom (1970): with m bits, n keys and k probes a key never added reads as maybe seen with
    probability about (1 - exp(-k n / m)) ** k; here m/n = 16, k = 4: 0.24 %."""
    monkeypatch.setattr(keyfilter, "MIN_BITS", 1 << 21)
    f = KeyFilter()
    n = f.bits // keyfilter.BITS_PER_KEY
    f.add([id_key(f"in-{k}") for k in range(n)])
    trials = 200_000
    rate = float(f.maybe([id_key(f"out-{k}") for k in range(trials)]).mean())
    expect = (1 - math.exp(-keyfilter.PROBES * n / f.bits)) ** keyfilter.PROBES
    sigma = math.sqrt(expect * (1 - expect) / trials)
    assert abs(rate - expect) < 6 * sigma, (rate, expect)


def test_keys_of_another_size_are_refused():
    with pytest.raises(ValueError, match="16 bytes"):
        KeyFilter().maybe([b"short"])


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.lists(ids, max_size=40), min_size=1, max_size=12))
def test_known_answers_as_a_set_of_every_committed_id(tmp_path_factory, monkeypatch_bits, bodies):
    """Commits of random ids (repeats within and across bodies) through a tiny filter and a tiny
    index buffer: ``known`` is exactly the committed ids, before and after a reopen."""
    seen_buffer = seen.BUFFER_KEYS
    seen.BUFFER_KEYS = 7  # keys move from seen_new to seen every few commits
    try:
        d = tmp_path_factory.mktemp("kf")
        j = Journal(d, sync="normal")
        committed: set[str] = set()
        seq = 1
        for body in bodies:
            keys = [id_key(i) for i in body]
            known = j.known(keys)
            assert known == {id_key(i) for i in body if i in committed}
            dups, pairs = number_events(keys, known, seq)
            new = [i for k, i in enumerate(body) if k not in dups]
            assert len(new) == len(set(body) - committed)  # a new id is never dropped, a repeat never taken
            if new:
                j.append([(seq, new, [b"{}"] * len(new))], pairs)
            seq += len(new)
            committed.update(new)
        probe = [id_key(i) for b in bodies for i in b] + [id_key("never-sent\x00")]
        expect = {id_key(i) for i in committed}
        assert j.known(probe) == expect
        j.close()
        j = Journal(d, sync="normal")
        assert j.known(probe) == expect
        j.close()
    finally:
        seen.BUFFER_KEYS = seen_buffer
