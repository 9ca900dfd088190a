"""`watcher import`: a data logger's CSV export into the record as it is (realistic samples,
invented for the test: a semicolon export with decimal commas, local day-first times and a
preamble, in Windows-1252; a comma export with month-first times in F)."""

import sqlite3
import subprocess
import sys
from datetime import datetime
from zoneinfo import ZoneInfo

import pytest

from tests.service_harness import write_secret
from watcher.errors import SeriesError
from watcher.files.logger import ColumnMap, read_export

SEMICOLON = (
    "Logger;EL-2 Kühlhaus 3\r\n"
    "Seriennummer;0451\r\n"
    "\r\n"
    "Nr.;Datum/Zeit;Temperatur (\xb0C);Feuchte (%rF)\r\n"
    "1;02.11.2026 08:00:00;-24,6;81\r\n"
    "2;02.11.2026 08:05:00;-24,4;81\r\n"
    "3;02.11.2026 08:10:00;---;81\r\n"
    "4;02.11.2026 08:15:00;-19,0;82\r\n"
    "5;02.11.2026 08:20:00;-80,0;82\r\n"
    "6;02.11.2026 08:25:00;-24,8;80\r\n"
)


def config(tmp_path, tz="Europe/Berlin"):
    write_secret(tmp_path / "pw", "x\n")
    path = tmp_path / "watcher.toml"
    path.write_text(
        f'[broker]\npassword_file = "{tmp_path / "pw"}"\n[storage]\npath = "{tmp_path / "w.db"}"\n'
        f'[[sites]]\nid = "kp"\ntimezone = "{tz}"\n[[zones]]\nid = "bulk-a"\nsetpoint_c = -25.0\n'
        '[[sources]]\npattern = "kp/{zone}/{sensor}/air"\nsignal = "air_c"\nvalue = "t"\n'
    )
    return path


def run(*args):
    return subprocess.run([sys.executable, "-m", "watcher", *args], capture_output=True, text=True, timeout=120)


def test_a_semicolon_export_with_decimal_commas_and_local_times_goes_into_the_record(tmp_path):
    """Four good rows stored with their local (Berlin) times converted to UTC and their decimal
    commas read; the '---' row and the -80 C row refused with their line numbers, kept in the
    rejections table; a second import of the same file adds nothing."""
    export = tmp_path / "kuehlhaus3.csv"
    export.write_bytes(SEMICOLON.encode("cp1252"))
    cfg = config(tmp_path)
    out = run("import", "--config", str(cfg), str(export), "--map", "time=Datum/Zeit,value=Temperatur (°C)")
    assert out.returncode == 0, out.stdout + out.stderr
    assert "delimiter ';'" in out.stdout and "'%d.%m.%Y %H:%M:%S'" in out.stdout
    assert "4 readings taken (4 new, 0 late), 0 already in the record, 2 rows refused." in out.stdout, out.stdout
    assert "refused line 7: column Temperatur (°C): '---' is not a number" in out.stdout
    assert "refused line 9: temperature -80.00 C outside" in out.stdout
    with sqlite3.connect(tmp_path / "w.db") as db:
        rows = db.execute("SELECT zone, sensor, signal, ts, value FROM readings ORDER BY ts").fetchall()
        reasons = [r[0] for r in db.execute("SELECT reason FROM rejections ORDER BY id")]
    first = datetime(2026, 11, 2, 8, 0, tzinfo=ZoneInfo("Europe/Berlin")).timestamp()  # 07:00 UTC
    assert rows[0] == ("bulk-a", "kuehlhaus3", "air_c", first, -24.6)
    assert [r[4] for r in rows] == [-24.6, -24.4, -19.0, -24.8]
    assert len(reasons) == 2 and reasons[0].startswith("line 7:")
    again = run("import", "--config", str(cfg), str(export), "--map", "time=Datum/Zeit,value=Temperatur (°C)")
    assert "0 readings taken (0 new, 0 late), 4 already in the record" in again.stdout, again.stdout


def test_month_first_fahrenheit_export_and_an_ambiguous_one(tmp_path):
    """A US-style export (month-first, 12-hour clock, F) is read once the rows tell the order;
    one whose dates fit both orders is refused until --time-format says which."""
    us = tmp_path / "us.csv"
    us.write_text('"Time","Temp (F)"\n"11/13/2026 08:00:00 AM","-13.0"\n"11/13/2026 01:00:00 PM","-4.0"\n')
    got = read_export(str(us), ColumnMap(time="Time", value="Temp (F)", unit="F"), "America/Chicago")
    assert got.time_format == "%m/%d/%Y %I:%M:%S %p" and [r[2] for r in got.records()] == [-13.0, -4.0]
    ambiguous = tmp_path / "amb.csv"
    ambiguous.write_text("when,t\n03/04/2026 08:00,-24.0\n04/05/2026 08:00,-24.1\n")
    with pytest.raises(SeriesError, match="both day-first and month-first fit every row; give --time-format"):
        read_export(str(ambiguous), ColumnMap(time="when", value="t"), "UTC")
    chosen = read_export(str(ambiguous), ColumnMap(time="when", value="t"), "UTC", "%d/%m/%Y %H:%M")
    assert datetime.fromtimestamp(next(chosen.records())[1], ZoneInfo("UTC")).month == 4
    out = run("import", "--config", str(config(tmp_path)), str(us), "--map", "time=Time,value=Temp (F),unit=F")
    assert "2 readings taken" in out.stdout, out.stdout + out.stderr


def test_a_map_that_names_no_column_of_the_file_says_so(tmp_path):
    """Exit 2 naming the columns looked for."""
    export = tmp_path / "e.csv"
    export.write_text("a,b\n1,2\n")
    out = run("import", "--config", str(config(tmp_path)), str(export), "--map", "time=Zeit,value=Wert")
    assert out.returncode == 2 and "Zeit, Wert" in out.stderr and "a header line naming both" in out.stderr, out.stderr
