"""Cost of the whole-history deduplication index and of the two durability modes, per million ids.

Everything runs on real SQLite files in a temporary folder through :class:`service.storage.journal.Journal`,
the code the service commits with. Prints a table; the last line is one JSON object. Figures:

* ``index_bytes_per_million`` and ``index_vs_raw_bytes``: growth of the database file per million
  indexed ids (rows of the sorted runs: a 16-byte key, a run number and a position), against the
  16 MB that the bare keys take in a flat file (the baseline).
* ``lookup_us_per_id`` and ``lookup_vs_set``: :meth:`Journal.known` on batches of 5,000 ids (half
  known, half new) against a history of ``--history`` ids, per id, against a Python ``set`` holding
  the same keys in memory (what an in-memory index costs; it also grows RSS without bound).
* ``commit_with_index_vs_without``: mean time of a commit of 5,000 events (journal rows plus their
  keys, after the lookup) against the same commits of the rows alone, both with
  ``synchronous=FULL``, at that history size, over enough commits that the buffer of new keys is
  written as a sorted run twice (those commits are the slow ones: ``commit_ms_max_with_index``).
* ``set_mb_per_million``: memory an in-memory set of the keys takes per million ids (the set and its
  bytes objects, by ``sys.getsizeof``),
  the cost the on-disk index avoids (its own memory is SQLite's page cache, 2 MB by default).
* ``normal_vs_full_commit_<n>``: commit time with ``synchronous=NORMAL`` divided by ``FULL`` for
  commits of ``n`` events (1, 100, 5,000): the price of surviving power loss, not just a crash.

History-growth mode (``--growth N``): does the cost of a commit grow with the history? Commits of
500 events of 100-byte payloads (``synchronous=NORMAL``), each a lookup (:meth:`Journal.known`) and
an append with the keys, up to ``N`` events, on this checkout and on a baseline (``--baseline REF``,
a git revision extracted to a temporary folder with ``git archive``; default ``main``), one after
the other in fresh processes. Per window of 262,144 events: the mean and the worst commit (ms),
the process CPU (user + system, s: the machine may be shared) and the size of the write-ahead log.
A merge of the index's largest runs spreads over 4 windows (1,048,576 events) and is under way
in half of them, so window means alternate; figures over whole *cycles* of 4 windows say more:
``<before|after>_mean_ms_per_cycle``, ``mean_vs_baseline_last_cycle`` (this checkout over the
baseline in the last, possibly partial, cycle), ``worst_vs_baseline_last`` (worst commit of the last
window) and ``cpu_vs_baseline`` (process CPU of the whole run).

Usage: ``python3 benchmarks/dedup.py [--history 1000000] [--repeats 20]``;
``python3 benchmarks/dedup.py --growth 3000000 [--baseline main]``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import orjson

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.storage import seen  # noqa: E402
from service.storage.journal import FILE_NAME, Journal  # noqa: E402

BATCH = 5000
GROWTH_BODY = 500
GROWTH_WINDOW = 262_144

#: the growth loop, run with a checkout first on ``sys.path`` (argv: checkout, events); one JSON line per window
_GROWTH_WORKER = """
import json, os, resource, sys, tempfile, time
sys.path.insert(0, sys.argv[1])
from service.storage.journal import Journal
from service.storage.seen import id_key
total, body, window = int(sys.argv[2]), %d, %d
folder = tempfile.mkdtemp()
j = Journal(folder, sync="normal")
seq, times = 1, []
def cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime
cpu0 = cpu()
for _ in range(total // body):
    ids = [f"ev{seq + k}" for k in range(body)]
    keys = [(id_key(i), seq + k) for k, i in enumerate(ids)]
    t = time.perf_counter()
    j.known([k for k, _ in keys])
    j.append([(seq, ids, [b"x" * 100] * body)], keys)
    times.append(time.perf_counter() - t)
    seq += body
    if seq %% window < body:
        wal = os.path.getsize(os.path.join(folder, "trimtab.sqlite-wal"))
        print(json.dumps({"events": seq - 1, "mean_ms": 1e3 * sum(times) / len(times), "worst_ms": 1e3 * max(times),
                          "cpu_s": cpu() - cpu0, "wal_mb": wal / 1e6}), flush=True)
        times, cpu0 = [], cpu()
j.close()
""" % (GROWTH_BODY, GROWTH_WINDOW)


def payloads(tag: str, n: int) -> tuple[list[str], list[bytes]]:
    """``n`` journal payloads shaped like the demo feed's events."""
    ids = [f"{tag}-{k:09d}" for k in range(n)]
    return ids, [orjson.dumps((i, 1772439300.0 + k, {"ambient_c": 21.4 + k % 7, "door_open_s": 35, "load_kg": 410,
                                                      "van": f"V{k % 40:02d}", "route": "urban"}, 4.8))
                 for k, i in enumerate(ids)]


def fill_history(folder: Path, n: int) -> tuple[Journal, float]:
    """A journal whose index holds ``n`` ids; returns it and the file growth in bytes."""
    j = Journal(folder, sync="normal")
    before = (folder / FILE_NAME).stat().st_size
    for start in range(0, n, 100_000):
        keys = [(seen.id_key(f"h-{k:09d}"), k + 1) for k in range(start, min(n, start + 100_000))]
        j.append([(keys[0][1], None, 1, b"[0, 0, null]")], keys)  # one small row carries the transaction
    j._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    return j, (folder / FILE_NAME).stat().st_size - before


def time_commits(j: Journal, tag: str, size: int, repeats: int, index: bool, first_seq: int) -> list[float]:
    """Seconds per commit of ``size`` events, as the service commits them (lookup, rows, keys)."""
    out = []
    for r in range(repeats):
        ids, pays = payloads(f"{tag}{r}", size)
        t0 = time.perf_counter()
        if index:
            keys = [seen.id_key(i) for i in ids]
            known = j.known(keys)
            _, pairs = seen.number_events(keys, known, first_seq)
        else:
            pairs = []
        j.append([(first_seq, ids, pays)], pairs)
        out.append(time.perf_counter() - t0)
        first_seq += size
    return out


def growth_windows(checkout: Path, events: int) -> list[dict]:
    """The growth loop on ``checkout`` in a fresh process: one dict per window of events."""
    out = subprocess.run([sys.executable, "-c", _GROWTH_WORKER, str(checkout), str(events)],
                         capture_output=True, text=True, check=True).stdout
    return [json.loads(line) for line in out.splitlines() if line.startswith("{")]


def growth(events: int, baseline: str) -> dict:
    """History-growth mode: this checkout against ``baseline`` (see the module docstring)."""
    here = Path(__file__).resolve().parents[1]
    with tempfile.TemporaryDirectory() as tmp:
        archive = subprocess.run(["git", "-C", str(here), "archive", baseline], capture_output=True, check=True)
        subprocess.run(["tar", "-x", "-C", tmp], input=archive.stdout, check=True)
        before = growth_windows(Path(tmp), events)
    after = growth_windows(here, events)
    print(f"{'events':>9} | {'before: mean ms':>15} {'worst ms':>8} {'cpu s':>6} {'wal MB':>6} | "
          f"{'after: mean ms':>14} {'worst ms':>8} {'cpu s':>6} {'wal MB':>6} | mean ratio")
    for b, a in zip(before, after):
        print(f"{a['events']:>9} | {b['mean_ms']:>15.2f} {b['worst_ms']:>8.0f} {b['cpu_s']:>6.1f} "
              f"{b['wal_mb']:>6.0f} | "
              f"{a['mean_ms']:>14.2f} {a['worst_ms']:>8.0f} {a['cpu_s']:>6.1f} {a['wal_mb']:>6.0f} | "
              f"{a['mean_ms'] / b['mean_ms']:.2f}")
    res = {"events": events, "baseline": baseline, "python": platform.python_version(), "cores": os.cpu_count()}
    for name, runs in (("before", before), ("after", after)):
        res[f"{name}_mean_ms"] = [round(w["mean_ms"], 2) for w in runs]
        res[f"{name}_worst_ms"] = [round(w["worst_ms"]) for w in runs]
        res[f"{name}_wal_mb_last"] = round(runs[-1]["wal_mb"])
        res[f"{name}_mean_ms_per_cycle"] = [round(statistics.mean(w["mean_ms"] for w in runs[i:i + 4]), 2)
                                            for i in range(0, len(runs), 4)]
    last_cycle = res["after_mean_ms_per_cycle"][-1] / res["before_mean_ms_per_cycle"][-1]
    res["mean_vs_baseline_last_cycle"] = round(last_cycle, 2)
    res["worst_vs_baseline_last"] = round(after[-1]["worst_ms"] / before[-1]["worst_ms"], 2)
    res["cpu_vs_baseline"] = round(sum(w["cpu_s"] for w in after) / sum(w["cpu_s"] for w in before), 2)
    return res


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--history", type=int, default=1_000_000, help="ids in the index before timing")
    ap.add_argument("--repeats", type=int, default=20, help="timed commits/lookups per figure")
    ap.add_argument("--growth", type=int, default=0, help="history-growth mode: events to commit")
    ap.add_argument("--baseline", default="main", help="git revision compared in the history-growth mode")
    args = ap.parse_args()
    if args.growth:
        res = growth(args.growth, args.baseline)
        print(json.dumps(res))
        return 0
    n, reps = args.history, args.repeats
    res: dict = {"history": n, "python": platform.python_version(), "machine": platform.machine(),
                 "cores": os.cpu_count()}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        j, grown = fill_history(tmp / "indexed", n)
        res["fill_s"] = round(time.perf_counter() - t0, 2)
        res["index_bytes_per_million"] = round(grown * 1e6 / n)
        res["index_vs_raw_bytes"] = round(grown / (16 * n), 2)

        keys = [seen.id_key(f"h-{k:09d}") for k in range(n)]
        as_set = set(keys)
        held = sys.getsizeof(as_set) + sum(sys.getsizeof(k) for k in keys)
        res["set_mb_per_million"] = round(held / 2**20 * 1e6 / n, 1)
        probe = [keys[(k * 7919) % n] for k in range(BATCH // 2)] + [seen.id_key(f"new-{k}") for k in range(BATCH // 2)]
        db_t, set_t = [], []
        for _ in range(reps):
            t = time.perf_counter()
            found = j.known(probe)
            db_t.append(time.perf_counter() - t)
            t = time.perf_counter()
            in_set = {k for k in probe if k in as_set}
            set_t.append(time.perf_counter() - t)
            assert found == in_set
        res["lookup_us_per_id"] = round(statistics.median(db_t) / BATCH * 1e6, 3)
        res["lookup_vs_set"] = round(statistics.median(db_t) / statistics.median(set_t), 1)
        j.close()

        commits = 2 * seen.BUFFER_KEYS // BATCH + 2
        j = Journal(tmp / "indexed", sync="full")
        with_index = time_commits(j, "w", BATCH, commits, True, n + 1)
        j.close()
        plain = Journal(tmp / "plain", sync="full")
        without = time_commits(plain, "p", BATCH, commits, False, 1)
        res["commit_ms_with_index"] = round(statistics.mean(with_index) * 1e3, 2)
        res["commit_ms_max_with_index"] = round(max(with_index) * 1e3, 2)
        res["commit_ms_without_index"] = round(statistics.mean(without) * 1e3, 2)
        res["commit_with_index_vs_without"] = round(statistics.mean(with_index) / statistics.mean(without), 2)
        res["commit_us_per_event_added_by_index"] = round((statistics.mean(with_index) - statistics.mean(without))
                                                           / BATCH * 1e6, 1)
        plain.close()

        for size in (1, 100, BATCH):
            times = {}
            for sync in ("full", "normal"):
                jj = Journal(tmp / f"sync-{sync}-{size}", sync=sync)
                times[sync] = statistics.median(time_commits(jj, sync, size, reps, True, 1))
                jj.close()
            res[f"commit_ms_full_{size}"] = round(times["full"] * 1e3, 3)
            res[f"normal_vs_full_commit_{size}"] = round(times["normal"] / times["full"], 3)
        del as_set

    width = max(len(k) for k in res)
    for k, v in res.items():
        print(f"{k:<{width}}  {v}")
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
