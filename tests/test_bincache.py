"""Per-bin sums kept between event-analysis passes (watcher/store/bincache.py) and the
summary's one pass over many zones (Reports.zone_bins): every answer equals the database's own
sums, whatever was written, undone or deleted in between (real SQLite files, a second
connection for another process's writes)."""

import numpy as np
import pytest

from tests.test_engine import make
from watcher.errors import StoreError
from watcher.ingest.payload import Reading
from watcher.store.bincache import BinWindow, as_arrays
from watcher.store.db import Store

T = 1_795_000_020.0  # on a minute
BIN_S = 60.0


def fresh(store, after_ts, upto_ts):
    """The database's sums with nothing kept, by the test's own query: the reference."""
    rows = store.conn.execute(
        "SELECT CAST(ts / 60.0 AS INTEGER) AS k, sum(value), count(*) FROM readings "
        "WHERE zone = 'bulk-a' AND signal = 'air_c' AND ts > ? AND ts <= ? GROUP BY k ORDER BY k",
        (after_ts, upto_ts),
    ).fetchall()
    return as_arrays(rows)


def same(a, b) -> bool:
    return all(np.array_equal(x, y) for x, y in zip(a, b))


def write(store, minutes, sensors=("s1", "s2", "s3"), offset_s=0.0, value=-25.0):
    rows = [
        (Reading("bulk-a", s, "air_c", T + 60.0 * m + offset_s, value + 0.1 * m + i), T, f"kp/bulk-a/{s}/air")
        for m in minutes
        for i, s in enumerate(sensors)
    ]
    with store.atomic():
        assert store.readings.add_all_new(rows)


def test_cached_sums_follow_new_late_and_off_minute_readings(tmp_path):
    """Passes over a moving four-day window, with readings arriving in order, late into bins
    already summed, between whole minutes and exactly on the window's edges: each pass gives
    the database's own (k, sum, count), and the later passes ask it only for the new bins."""
    _, store, _ = make(tmp_path, reorder=0.0)
    write(store, range(0, 6000))
    asked = []
    original = store.readings._bins

    def counting(*args, **kw):
        rows = original(*args, **kw)
        asked.append(len(rows))
        return rows

    store.readings._bins = counting
    fed = T + 60.0 * 5999
    for step in range(6):
        after = fed - 4 * 86400.0
        got = store.readings.bins("bulk-a", "air_c", after, fed, BIN_S)
        assert same(got, fresh(store, after, fed)), step
        new = range(6000 + 15 * step, 6015 + 15 * step)
        write(store, new)
        write(store, [5990 - step], sensors=("late",))  # into a bin a pass has summed
        write(store, [5995 - step], sensors=("half",), offset_s=29.5)  # between whole minutes
        fed = T + 60.0 * new[-1]
    after = fed - 4 * 86400.0 + 0.25  # edges off the minute
    assert same(store.readings.bins("bulk-a", "air_c", after, fed - 0.5, BIN_S), fresh(store, after, fed - 0.5))
    # The last pass asked for the bottom edge bin and the bins from the earliest one a write
    # touched (the late reading, 104 minutes back) on: not the 5,760 of four days.
    assert max(asked[-3:]) <= 105 and asked[0] > 5700
    store.close()


def test_an_undone_transaction_and_a_fold_forget_what_was_kept(tmp_path):
    """Sums read inside a transaction that is then undone, and sums of rows retention folded
    away, are not answered again."""
    _, store, _ = make(tmp_path, reorder=0.0)
    write(store, range(0, 3000))
    fed = T + 60.0 * 3100
    after = fed - 3 * 86400.0
    with pytest.raises(StoreError):
        with store.atomic():
            store.readings.add_all_new(
                [
                    (Reading("bulk-a", "s1", "air_c", T + 60.0 * m, 5.0), T, "kp/bulk-a/s1/air")
                    for m in range(3000, 3100)
                ]
            )
            store.readings.bins("bulk-a", "air_c", after, fed, BIN_S)  # sees the rows about to be undone
            raise StoreError("the disk went away")
    assert same(store.readings.bins("bulk-a", "air_c", after, fed, BIN_S), fresh(store, after, fed))
    with store.atomic():
        store.readings.fold("bulk-a", T + 60.0 * 1500, T + 86400.0 * 400)
    got = store.readings.bins("bulk-a", "air_c", after, fed, BIN_S)
    assert same(got, fresh(store, after, fed)) and got[0][0] * BIN_S > T + 60.0 * 1500
    store.close()


def test_another_connections_commit_forgets_what_was_kept(tmp_path):
    """A reading another process committed into a summed bin (a hand edit through the view
    included) is in the next answer."""
    cfg, store, _ = make(tmp_path, reorder=0.0)
    write(store, range(0, 3000))
    fed = T + 60.0 * 2999
    after = fed - 2 * 86400.0
    store.readings.bins("bulk-a", "air_c", after, fed, BIN_S)
    other = Store(cfg.storage.path)
    write(other, [2500], sensors=("other",))
    other.conn.execute("UPDATE readings SET value = 3.0 WHERE sensor = 's2' AND ts = ?", (T + 60.0 * 2400,))
    other.close()
    got = store.readings.bins("bulk-a", "air_c", after, fed, BIN_S)
    assert same(got, fresh(store, after, fed))
    k = np.flatnonzero(got[0] == int((T + 60.0 * 2400) / BIN_S))
    assert got[2][int(np.flatnonzero(got[0] == int((T + 60.0 * 2500) / BIN_S))[0])] == 4 and k.size == 1
    store.close()


def test_a_window_keeps_only_its_last_bins_and_forgets_touched_ones():
    """The window's own bookkeeping (a fast test beside the database ones): sliding drops the
    oldest bins, a forgotten bin is asked for again, bins before the window always are."""
    w = BinWindow(10)
    w.slide(100)
    w.store([(91, 1.0, 1), (95, 2.0, 2)], 90, 100)
    assert w.first_unknown(90, 100) == 100 and w.first_unknown(85, 100) == 85
    w.forget(95)
    assert w.first_unknown(90, 100) == 95
    k, s, n = w.arrays(90, 95)
    assert k.tolist() == [91] and s.tolist() == [1.0] and n.tolist() == [1]
    w.slide(104)
    assert w.k0 == 94 and w.first_unknown(94, 95) == 95 and w.first_unknown(96, 104) == 100
    w.slide(200)
    assert w.first_unknown(190, 200) == 190


def test_many_zones_at_once_give_each_zones_own_sums(tmp_path):
    """The summary's one pass over a span's rows (Reports.zone_bins) gives each zone what its
    own query gives (to rounding: the sums add the same readings in another order), for a span
    stored in order and for one whose readings partly arrived long after (a backfill: the row
    range is then far wider than the span and the zones are read one by one)."""
    _, store, _ = make(tmp_path, reorder=0.0)
    for m in range(0, 3000, 10):
        rows = [
            (Reading(zone, s, "air_c", T + 60.0 * k, -25.0 + 0.37 * k + i), T, f"kp/{zone}/{s}/air")
            for k in range(m, m + 10)
            for zone in ("bulk-a", "dispatch")
            for i, s in enumerate(("s1", "s2", "s3"))
        ]
        with store.atomic():
            assert store.readings.add_all_new(rows)
    after, upto = T + 60.0 * 1000 + 30.0, T + 60.0 * 2000
    by_zone = []
    indexed = store.reports._zone_bins_indexed
    store.reports._zone_bins_indexed = lambda zone, *a: by_zone.append(zone) or indexed(zone, *a)
    for label in ("in order", "backfilled"):
        if label == "backfilled":
            write(store, range(3000, 12000))  # much else stored, then rows of the span
            write(store, range(1500, 1510), sensors=("late",))
        got = store.reports.zone_bins(("bulk-a", "dispatch"), "air_c", after, upto, BIN_S)
        for zone in ("bulk-a", "dispatch"):
            want = as_arrays(store.readings._bins(zone, "air_c", after, upto, BIN_S))
            assert np.array_equal(got[zone][0], want[0]) and np.array_equal(got[zone][2], want[2]), label
            assert np.allclose(got[zone][1], want[1], rtol=1e-12, atol=0.0), label
    assert got["bulk-a"][2].max() == 4  # the backfilled sensor is in its bins
    assert by_zone == ["bulk-a", "dispatch"]  # read zone by zone, the second time only
