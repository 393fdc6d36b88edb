"""Readers of historian exports: layouts, compression, timestamp kinds, DST hours, bad rows.

Expected times come from Python's own ``datetime``/``zoneinfo`` (the IANA time
zone database), not from the reader's pyarrow code; expected SI values from
the unit definitions (1 MPa = 1e6 Pa, 0 °C = 273.15 K, gauge + 101.325 kPa).
"""

from __future__ import annotations

import gzip
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from twin.config import load_config
from twin.history import HistoryError, HistoryReader, read_samples

ROOT = Path(__file__).resolve().parents[1]
BERLIN = ZoneInfo("Europe/Berlin")  # IANA tz database via zoneinfo


@pytest.fixture(scope="module")
def config():
    return load_config(ROOT / "configs" / "demo-u1.toml")


def _epoch(text: str) -> float:
    return datetime.fromisoformat(text).timestamp()


def _read(config, path, **kw):
    r = HistoryReader(config, **kw)
    s = read_samples(r, [path])
    return s, r.reports[str(path)]


GOOD_LONG = """timestamp,tag,value,quality
2026-03-29T00:00:00Z,HP-MS-P1,15.0,good
2026-03-29T00:00:00+01:00,HP-MS-T1,540.0,192
2026-03-29T00:00:01.250Z,HP-MS-P1,15.5,bad
"""


def test_long_csv_values_in_si_and_times(config, tmp_path):
    p = tmp_path / "long.csv"
    p.write_text(GOOD_LONG)
    s, rep = _read(config, p)
    assert rep.layout == "long" and rep.time.kind == "rfc3339" and rep.time.how == "detected"
    assert rep.bad_rows == 0 and len(s) == 3
    tags = [config.sensors[i].tag for i in s.tag]
    assert tags == ["HP-MS-P1", "HP-MS-T1", "HP-MS-P1"]
    # MPa(g) + standard atmosphere; degC + 273.15 (unit definitions)
    assert s.value[0] == pytest.approx(15.0e6 + 101325.0)
    assert s.value[1] == pytest.approx(540.0 + 273.15)
    assert s.t[0] == _epoch("2026-03-29T00:00:00+00:00")
    assert s.t[1] == _epoch("2026-03-29T00:00:00+01:00")
    assert s.t[2] == _epoch("2026-03-29T00:00:01.250+00:00")
    assert list(s.ok) == [True, True, False]  # "bad" is not a good quality


def test_gzip_and_wide_give_the_same_samples(config, tmp_path):
    wide = "timestamp,HP-MS-P1,HP-MS-T1\n2026-03-29T00:00:00Z,15.0,540.0\n2026-03-29T00:00:05Z,,541.0\n"
    p = tmp_path / "wide.csv.gz"
    with gzip.open(p, "wt") as f:
        f.write(wide)
    s, rep = _read(config, p)
    assert rep.layout == "wide" and rep.format == "csv.gz"
    assert len(s) == 3  # the empty cell is no sample, not an error
    assert rep.bad_rows == 0
    assert sorted(s.value) == pytest.approx(sorted([15.0e6 + 101325.0, 813.15, 814.15]))


def test_parquet_long_and_wide(config, tmp_path):
    t0 = datetime(2026, 3, 29, tzinfo=UTC)
    times = [t0, t0 + timedelta(seconds=5)]
    long_t = pa.table({"timestamp": pa.array(times, pa.timestamp("ms", tz="UTC")),
                       "tag": ["HP-MS-P1", "HP-MS-T1"], "value": [15.0, 540.0]})
    pq.write_table(long_t, tmp_path / "l.parquet")
    s, rep = _read(config, tmp_path / "l.parquet")
    assert rep.layout == "long" and rep.format == "parquet" and len(s) == 2
    assert list(s.t) == [t.timestamp() for t in times]
    wide_t = pa.table({"timestamp": [int(t.timestamp() * 1000) for t in times],
                       "HP-MS-P1": [15.0, None], "HP-MS-T1": [540.0, 541.0]})
    pq.write_table(wide_t, tmp_path / "w.parquet")
    s, rep = _read(config, tmp_path / "w.parquet")
    assert rep.layout == "wide" and rep.time.kind == "epoch_ms" and len(s) == 3
    assert set(s.t) == {t.timestamp() for t in times}


def test_epoch_seconds_and_milliseconds_detected(config, tmp_path):
    t = _epoch("2026-01-05T00:00:00+00:00")
    (tmp_path / "s.csv").write_text(f"timestamp,tag,value\n{t},HP-MS-P1,15\n{t + 1.5},HP-MS-P1,15\n")
    (tmp_path / "ms.csv").write_text(f"timestamp,tag,value\n{int(t * 1000)},HP-MS-P1,15\n{int(t * 1000) + 1500},HP-MS-P1,15\n")
    s1, r1 = _read(config, tmp_path / "s.csv")
    s2, r2 = _read(config, tmp_path / "ms.csv")
    assert (r1.time.kind, r2.time.kind) == ("epoch_s", "epoch_ms")
    assert list(s1.t) == list(s2.t) == [t, t + 1.5]


def test_millisecond_trap_is_refused_not_guessed(config, tmp_path):
    t_ms = int(_epoch("2026-01-05T00:00:00+00:00") * 1000)
    p = tmp_path / "ms.csv"
    p.write_text(f"timestamp,tag,value\n{t_ms},HP-MS-P1,15\n")
    with pytest.raises(HistoryError, match="declared epoch_s but their magnitude says milliseconds"):
        _read(config, p, timestamps="epoch_s")
    mixed = tmp_path / "mixed.csv"
    mixed.write_text(f"timestamp,tag,value\n{t_ms},HP-MS-P1,15\n{t_ms / 1000},HP-MS-P1,15\n")
    with pytest.raises(HistoryError, match="mix seconds and milliseconds"):
        _read(config, mixed)
    odd = tmp_path / "odd.csv"
    odd.write_text("timestamp,tag,value\n12345678901,HP-MS-P1,15\n")  # 1e10..1e11: neither kind
    with pytest.raises(HistoryError, match="no plausible magnitude"):
        _read(config, odd)


def test_naive_local_time_needs_a_zone(config, tmp_path):
    p = tmp_path / "local.csv"
    p.write_text("timestamp,tag,value\n2026-07-01 12:00:00,HP-MS-P1,15\n")
    with pytest.raises(HistoryError, match="no zone offset; expected --timezone"):
        _read(config, p)
    s, rep = _read(config, p, timezone="Europe/Berlin")
    assert rep.time.kind == "local"
    assert s.t[0] == datetime(2026, 7, 1, 12, tzinfo=BERLIN).timestamp()


def test_dst_repeated_hour_resolved_by_file_order(config, tmp_path):
    # 2026-10-25: clocks in Berlin go from 03:00 CEST back to 02:00 CET
    walls = ["01:30:00", "02:00:00", "02:30:00", "02:59:59", "02:00:00", "02:30:00", "03:00:00"]
    rows = "".join(f"2026-10-25 {w},HP-MS-P1,15\n" for w in walls)
    p = tmp_path / "autumn.csv"
    p.write_text("timestamp,tag,value\n" + rows)
    s, rep = _read(config, p, timezone="Europe/Berlin")
    expect = []
    for i, w in enumerate(walls):
        h, m, sec = (int(x) for x in w.split(":"))
        fold = 1 if i in (4, 5) else 0  # second pass through 02:xx is the later (CET) hour
        expect.append(datetime(2026, 10, 25, h, m, sec, tzinfo=BERLIN, fold=fold).timestamp())
    assert list(s.t) == expect
    assert np.all(np.diff(s.t) > 0)  # strictly increasing in UTC
    assert rep.time.repeated_hour_rows == 5 and rep.time.second_pass_rows == 2
    assert any("repeated local hour on 2026-10-25" in n for n in rep.time.dst_notes)


def test_dst_second_pass_reaching_the_first_pass_last_time(config, tmp_path):
    # 2026-10-25 Berlin, two tags per time: the second pass ends at 02:59:40 again, the
    # highest wall time of the first pass; it and its second tag are still the later hour
    walls = ["02:59:20", "02:59:40", "02:00:00", "02:59:40", "03:00:00"]
    folds = [0, 0, 1, 1, 0]
    rows = "".join(f"2026-10-25 {w},{tag},15\n" for w in walls for tag in ("HP-MS-P1", "HP-MS-P2"))
    p = tmp_path / "autumn-edge.csv"
    p.write_text("timestamp,tag,value\n" + rows)
    for block_size in (40, 16 << 20):  # the carried pass across block edges too
        s, rep = _read(config, p, timezone="Europe/Berlin", block_size=block_size)
        expect = [datetime(2026, 10, 25, *(int(x) for x in w.split(":")), tzinfo=BERLIN, fold=f).timestamp()
                  for w, f in zip(walls, folds, strict=True) for _ in range(2)]
        assert list(s.t) == expect
        assert rep.time.second_pass_rows == 4 and rep.time.repeated_hour_rows == 8


def test_dst_missing_hour_rows_refused_and_counted(config, tmp_path):
    # 2026-03-29: clocks in Berlin jump from 02:00 CET to 03:00 CEST; 02:30 does not exist
    p = tmp_path / "spring.csv"
    p.write_text("timestamp,tag,value\n2026-03-29 01:59:00,HP-MS-P1,15\n2026-03-29 02:30:00,HP-MS-P1,15\n"
                 "2026-03-29 03:00:00,HP-MS-P1,15\n")
    s, rep = _read(config, p, timezone="Europe/Berlin")
    assert list(s.t) == [datetime(2026, 3, 29, 1, 59, tzinfo=BERLIN).timestamp(),
                         datetime(2026, 3, 29, 3, 0, tzinfo=BERLIN).timestamp()]
    assert rep.time.missing_hour_rows == 1 and rep.bad_rows == 1
    assert any(e.startswith(f"{p}:3: local time 2026-03-29 02:30:00 does not exist") for e in rep.errors)


def test_each_bad_row_kind_one_line_counted_skipped(config, tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text(
        "timestamp,tag,value,quality\n"  # 1
        "2026-03-29T00:00:00Z,HP-MS-P1,15.1,good\n"  # 2 good
        "\n"  # 3 blank: ignored
        "2026-03-29T00:00:01Z,HP-MS-P1,abc,good\n"  # 4 not a number
        "2026-03-29T00:00:01Z,NOPE,1,good\n"  # 5 unknown tag
        "yesterday,HP-MS-P1,1,good\n"  # 6 bad timestamp
        "2026-03-29T00:00:02Z,HP-MS-P1,15.2\n"  # 7 quality omitted: good
        "2026-03-29T00:00:02Z,HP-MS-P1,15.2,good,extra\n"  # 8 too many fields
        "2026-03-29T00:00:03Z,HP-MS-P1,99999,good\n"  # 9 out of the 0..25 MPa span
        "2026-03-29T00:00:04Z,HP-MS-P1,nan,good\n"  # 10 not finite
    )
    s, rep = _read(config, p)
    assert len(s) == 2  # lines 2 and 7
    assert rep.bad_rows == 3  # lines 4, 6, 8 are unreadable
    assert rep.rejected == {"unknown_tag": 1, "out_of_range": 1, "not_finite": 1}
    by_line = {e.split(": ", 1)[0]: e for e in rep.errors}
    assert "expected a number in MPa(g)" in by_line[f"{p}:4"]
    assert "unknown tag 'NOPE'" in by_line[f"{p}:5"]
    assert "timestamp 'yesterday' is not RFC 3339" in by_line[f"{p}:6"]
    assert "5 fields; expected timestamp,tag,value[,quality]" in by_line[f"{p}:8"]
    assert all("\n" not in e for e in rep.errors)


def test_unreadable_files_say_what_was_expected(config, tmp_path):
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(HistoryError, match="empty file; expected a header"):
        _read(config, tmp_path / "empty.csv")
    (tmp_path / "hdr.csv").write_text("when,what\n1,2\n")
    with pytest.raises(HistoryError, match="expected timestamp,tag,value"):
        _read(config, tmp_path / "hdr.csv")
    (tmp_path / "x.parquet").write_bytes(b"not parquet")
    with pytest.raises(HistoryError, match=r"x\.parquet"):
        _read(config, tmp_path / "x.parquet")
    with pytest.raises(FileNotFoundError):
        _read(config, tmp_path / "missing.csv")
    import gzip

    good = gzip.compress(b"timestamp,tag,value\n" + b"2026-01-05T00:00:00Z,GEN-MW1,300\n" * 50)
    (tmp_path / "cut.csv.gz").write_bytes(good[: len(good) // 2])  # a copy that stopped half-way
    with pytest.raises(HistoryError, match=r"cut\.csv\.gz: cannot be read .*expected CSV \(optionally gzip\)"):
        _read(config, tmp_path / "cut.csv.gz")
    bad = bytearray(good)
    bad[-6] ^= 0xFF  # the CRC-32 in the gzip trailer (RFC 1952)
    (tmp_path / "crc.csv.gz").write_bytes(bytes(bad))
    with pytest.raises(HistoryError, match=r"crc\.csv\.gz: cannot be read"):
        _read(config, tmp_path / "crc.csv.gz")


def test_memory_bounded_by_block(config, tmp_path):
    """Many small blocks give the same samples as one big block."""
    t0 = _epoch("2026-01-05T00:00:00+00:00")
    lines = "".join(f"{t0 + k},HP-MS-P1,{15 + k * 1e-4}\n" for k in range(5000))
    p = tmp_path / "big.csv"
    p.write_text("timestamp,tag,value\n" + lines)
    r_small = HistoryReader(config, block_size=4096)
    blocks = list(r_small.read(p))
    assert len(blocks) > 10 and max(len(b) for b in blocks) < 200
    whole = read_samples(HistoryReader(config), [p])
    assert np.array_equal(np.concatenate([b.t for b in blocks]), whole.t)
    assert np.array_equal(np.concatenate([b.value for b in blocks]), whole.value)


def test_time_range_filter_counts_outside(config, tmp_path):
    p = tmp_path / "r.csv"
    t0 = _epoch("2026-01-05T00:00:00+00:00")
    p.write_text("timestamp,tag,value\n" + "".join(f"{t0 + k},HP-MS-P1,15\n" for k in range(10)))
    r = HistoryReader(config)
    s = read_samples(r, [p], t0 + 2, t0 + 5)
    assert list(s.t) == [t0 + 2, t0 + 3, t0 + 4]
    assert r.reports[str(p)].outside == 7
