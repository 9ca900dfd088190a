"""Verification marks: an intact `watcher verify` records what it proved, and `--since` then
hashes only what came after it, while still catching a rewrite of the rows before it."""

import sqlite3
import subprocess
import sys

from tests.test_engine import NOW, make, msg
from tests.test_integrity import filled  # noqa: F401  (the fixture)
from watcher.store import chain
from watcher.store.hashing import chain_hash

OLD = "2020-01-01"  # a --since date before every row: without a mark it means everything


def verify_cli(db, *args) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "watcher", "verify", "--db", str(db), *args], capture_output=True, text=True, timeout=60
    )


def checked(out: str) -> dict[str, int]:
    """{chain: rows checked} from verify's output."""
    rows = {}
    for line in out.splitlines():
        if line.endswith("rows checked"):
            name, n = line.split()[:2]
            rows[name] = int(n)
    return rows


def spans(out: str, chain_name: str, row_id: int) -> bool:
    """verify's MISMATCH line for the chain names a span of rows (from the last kept hash that
    held to the next one) that holds row_id."""
    for line in out.splitlines():
        if line.startswith(f"MISMATCH {chain_name} row "):
            first = int(line.split(" row ")[1].split(":")[0])
            last = int(line.split("hash kept at row ")[1].split(":")[0]) if "hash kept at row" in line else first
            return first <= row_id <= last
    return False


def test_an_intact_verify_records_a_mark_and_since_hashes_only_what_is_new(filled, tmp_path):  # noqa: F811
    """A full verify of an intact record leaves a mark (itself chained); `--since` a date before
    everything then hashes no old reading, and after new readings arrive, exactly those."""
    assert verify_cli(filled, "--since", OLD).returncode == 0  # no mark yet: everything is hashed
    with sqlite3.connect(filled) as db:
        (marks,) = db.execute("SELECT count(*) FROM verify_marks").fetchone()
    assert marks == 1
    first = verify_cli(filled)
    assert first.returncode == 0 and checked(first.stdout)["readings/bulk-a"] == 601
    again = verify_cli(filled, "--since", OLD)
    assert again.returncode == 0, again.stdout
    assert checked(again.stdout)["readings/bulk-a"] == 0 and checked(again.stdout)["readings/dispatch"] == 0
    assert "verification mark 2" in again.stdout and "Record intact" in again.stdout
    cfg, store, engine = make(tmp_path, reorder=0.0)
    engine.process([msg("bulk-a", k) for k in range(600, 630)], now=NOW)
    store.close()
    new = verify_cli(filled, "--since", OLD)
    assert new.returncode == 0, new.stdout
    assert checked(new.stdout)["readings/bulk-a"] == 30 and checked(new.stdout)["readings/dispatch"] == 0
    assert checked(new.stdout)["verify_marks"] == 1  # the marks' own chain, from the newest mark's row on
    with sqlite3.connect(filled) as db:
        findings, _ = chain.verify(db)  # the marks' chain verifies in full too
    assert findings == []


def test_a_new_reading_altered_after_the_mark_is_found(filled):  # noqa: F811
    """A reading written after the mark and then altered: `--since` names it."""
    assert verify_cli(filled).returncode == 0
    cfg, store, engine = make(filled.parent, reorder=0.0)
    engine.process([msg("dispatch", k) for k in range(600, 610)], now=NOW)
    store.close()
    with sqlite3.connect(filled) as db:
        (row_id,) = db.execute("SELECT max(id) - 3 FROM readings WHERE zone = 'dispatch'").fetchone()
        db.execute("UPDATE readings SET value = value + 2 WHERE id = ?", (row_id,))
    out = verify_cli(filled, "--since", OLD)
    assert out.returncode == 1
    assert spans(out.stdout, "readings/dispatch", row_id), out.stdout


def test_a_rewrite_of_rows_before_the_mark_is_found_by_since(filled):  # noqa: F811
    """An old reading altered and every hash after it recomputed (a consistent rewrite of the
    zone's chain): the walk after the mark cannot see it, the mark's recorded hash does."""
    assert verify_cli(filled).returncode == 0
    with sqlite3.connect(filled) as db:
        rows = db.execute(
            f"SELECT id, chain, {', '.join(chain.READING_FIELDS)} FROM readings WHERE zone = 'bulk-a' ORDER BY id"
        ).fetchall()
        prev = rows[99][1]
        for i, (row_id, _, *values) in enumerate(rows[100:]):
            if i == 0:
                values[4] = values[4] + 3.0  # the value
                db.execute("UPDATE readings SET value = ? WHERE id = ?", (values[4], row_id))
            prev = chain_hash(prev, *values)
            db.execute("UPDATE readings SET chain = ? WHERE id = ?", (prev, row_id))
    out = verify_cli(filled, "--since", OLD)
    assert out.returncode == 1
    assert f"MISMATCH readings/bulk-a row {rows[-1][0]}: differs from the hash verification mark 1" in out.stdout


def test_an_old_row_altered_under_its_hash_needs_the_full_verify(filled):  # noqa: F811
    """What a mark cannot show, said in the docs: a row before it altered with its hash left as
    it was. `--since` after the mark does not hash that row; a full verify names it."""
    assert verify_cli(filled).returncode == 0
    with sqlite3.connect(filled) as db:
        (row_id,) = db.execute("SELECT min(id) + 50 FROM readings WHERE zone = 'bulk-a'").fetchone()
        db.execute("UPDATE readings SET value = value + 1 WHERE id = ?", (row_id,))
    assert verify_cli(filled, "--since", OLD).returncode == 0
    full = verify_cli(filled)
    assert full.returncode == 1 and spans(full.stdout, "readings/bulk-a", row_id), full.stdout


def test_an_altered_mark_breaks_the_marks_chain(filled):  # noqa: F811
    """A mark rewritten to say it proved more (or less): the marks' own chain names it."""
    assert verify_cli(filled).returncode == 0
    assert verify_cli(filled).returncode == 0
    with sqlite3.connect(filled) as db:
        db.execute("UPDATE verify_marks SET heads = replace(heads, '601', '700') WHERE id = 1")
    out = verify_cli(filled)
    assert out.returncode == 1 and "MISMATCH verify_marks row 1:" in out.stdout
    with sqlite3.connect(filled) as db:
        (marks,) = db.execute("SELECT count(*) FROM verify_marks").fetchone()
    assert marks == 2  # a verification that found something records no mark
