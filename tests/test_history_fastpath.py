"""The vectorised CSV split gives the same result as the line-by-line read.

Every file is read twice, with ``HistoryReader(fast=True)`` (clean blocks split in
one pass, blocks with a blank, comment or bad row read line by line) and with
``fast=False`` (every block line by line), at several block sizes so block
edges fall inside DST hours and bad stretches. Samples must be equal bit for
bit and the file reports (rows, bad rows with their lines and messages,
rejected counts, DST counts) equal. Where a row is bad the test itself knows
its line number from writing the file, and checks the message names it.
Expected UTC times of local rows come from ``zoneinfo`` (IANA tz database).
"""

from __future__ import annotations

import dataclasses
import gzip
import random
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from twin.config import load_config
from twin.history import HistoryError, HistoryReader, read_samples

ROOT = Path(__file__).resolve().parents[1]
BERLIN = ZoneInfo("Europe/Berlin")  # IANA tz database via zoneinfo
TAGS = ["HP-MS-P1", "HP-MS-T1", "HP-MS-P2"]
BLOCK_SIZES = (512, 4096, 16 << 20)


@pytest.fixture(scope="module")
def config():
    return load_config(ROOT / "configs" / "demo-u1.toml")


def _both(config, path, block_size, **kw):
    out = []
    for fast in (True, False):
        r = HistoryReader(config, block_size=block_size, fast=fast, **kw)
        s = read_samples(r, [path])
        out.append((s, r.reports[str(path)]))
    return out


def _assert_same(fast, slow):
    (sf, rf), (ss, rs) = fast, slow
    for k in ("t", "tag", "value", "ok"):
        assert np.array_equal(getattr(sf, k), getattr(ss, k), equal_nan=True), k
    df, ds = dataclasses.asdict(rf), dataclasses.asdict(rs)
    for d in (df, ds):
        d.pop("fast_blocks")
        d.pop("slow_blocks")
    assert df == ds
    assert rs.fast_blocks == 0


# bad-row kinds: (text of the line given a good timestamp/tag/value, part of the message)
def _bad_long(rng, stamp):
    kind = rng.randrange(9)
    if kind == 0:
        return f"{stamp},HP-MS-P1,abc,good", "is not a number", True
    if kind == 1:
        return f"{stamp},NOPE,1,good", None, False  # unknown tag: counted (first five named)
    if kind == 2:
        return "yesterday,HP-MS-P1,1,good", "timestamp 'yesterday' is not", True
    if kind == 3:
        return f"{stamp},HP-MS-P1,15,good,extra", "5 fields; expected timestamp,tag,value[,quality]", True
    if kind == 4:
        return f"{stamp},HP-MS-P1,99999,good", None, False  # out of range: counted
    if kind == 5:
        return f"{stamp},HP-MS-P1,nan,good", None, False  # not finite: counted
    if kind == 6:
        return "", None, False  # blank: ignored
    if kind == 7:
        return "# a comment, with, commas", None, False  # comment: ignored
    return f"{stamp},HP-MS-P1,,good", "is not a number", True


def _long_file(path: Path, rng: random.Random, stamps: list[str], messy, newline: str = "\n") -> dict[int, str]:
    """A long-layout file with a quality column; bad and quoted rows only where ``messy(k)``.

    Returns {line: message part} of the rows whose message must name them.
    """
    lines = ["timestamp,tag,value,quality"]
    expect: dict[int, str] = {}
    for k, stamp in enumerate(stamps):
        rough = messy(k)
        if rough and rng.random() < 0.1:
            text, part, named = _bad_long(rng, stamp)
            lines.append(text)
            if named and part:
                expect[len(lines)] = part
            continue
        tag = TAGS[k % len(TAGS)]
        value = {"HP-MS-P1": 15.0, "HP-MS-T1": 540.0, "HP-MS-P2": 14.0}[tag] + rng.uniform(-1, 1)
        style = rng.randrange(6)
        if style == 0:
            lines.append(f" {stamp} , {tag} , {value!r}\t, good ")  # blanks are trimmed
        elif style == 1:
            lines.append(f"{stamp},{tag},{value:.3e},192")
        elif style == 2:
            lines.append(f"{stamp},{tag},{value!r},bad")
        elif style == 3 and rough:
            lines.append(f'"{stamp}","{tag}","{value!r}"')  # quotes trimmed, quality omitted: good
        else:
            lines.append(f"{stamp},{tag},{value!r},good")
    path.write_bytes((newline.join(lines) + newline).encode())
    return expect


def _check_named(rep, path, expect):
    by_line = {}
    for e in rep.errors:
        head = e.split(": ", 1)[0]
        by_line.setdefault(head, e)
    for line, part in list(expect.items())[:20]:  # the first ones (at most 50 lines are kept)
        assert part in by_line[f"{path}:{line}"], (line, part)


def _rfc_stamps(n, rng):
    t0 = datetime(2026, 3, 29, tzinfo=UTC)
    out = []
    for k in range(n):
        t = t0 + timedelta(seconds=k)
        if rng.random() < 0.5:
            out.append(t.isoformat().replace("+00:00", "Z"))
        else:
            out.append((t.astimezone(BERLIN)).isoformat())
    return out


@pytest.mark.parametrize("block_size", BLOCK_SIZES)
@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_rfc3339_long_with_every_bad_kind(config, tmp_path, block_size, newline):
    rng = random.Random(3)
    p = tmp_path / "mixed.csv"
    # clean stretches (fast blocks) around a stretch with bad, blank, comment and quoted rows
    expect = _long_file(p, rng, _rfc_stamps(3000, rng), lambda k: 1000 <= k < 2000, newline)
    fast, slow = _both(config, p, block_size)
    _assert_same(fast, slow)
    rep = fast[1]
    assert rep.bad_rows > 0 and set(rep.rejected) == {"unknown_tag", "out_of_range", "not_finite"}
    if block_size <= 4096:
        assert rep.fast_blocks > 0 and rep.slow_blocks > 0
    _check_named(rep, p, expect)


@pytest.mark.parametrize("block_size", BLOCK_SIZES)
def test_local_times_over_both_dst_changes(config, tmp_path, block_size):
    # 2026-03-29 Berlin: 02:00 -> 03:00 (02:xx does not exist); 2026-10-25: 03:00 -> 02:00 (02:xx twice)
    rng = random.Random(5)
    stamps, truth = [], []
    for day, start in ((29, datetime(2026, 3, 29, 0, 30, tzinfo=UTC)), (25, datetime(2026, 10, 24, 23, 0, tzinfo=UTC))):
        for k in range(0, 4 * 3600, 20):
            t = start + timedelta(seconds=k)
            local = t.astimezone(BERLIN)
            stamps.append(local.strftime("%Y-%m-%d %H:%M:%S"))
            truth.append(t.timestamp())
        # rows inside the spring gap (refused), written by a clock that did not jump
        if day == 29:
            stamps += ["2026-03-29 02:15:00", "2026-03-29 02:45:00"]
            truth += [None, None]
    p = tmp_path / "local.csv"
    p.write_text("timestamp,tag,value\n" + "".join(f"{s},HP-MS-P1,{15 + rng.uniform(-1, 1)!r}\n" for s in stamps))
    fast, slow = _both(config, p, block_size, timezone="Europe/Berlin")
    _assert_same(fast, slow)
    s, rep = fast
    assert list(s.t) == [t for t in truth if t is not None]  # zoneinfo truth, repeated hour by file order
    assert rep.time.missing_hour_rows == 2 and rep.time.repeated_hour_rows == 2 * 180
    assert rep.time.second_pass_rows == 180
    if block_size <= 4096:
        assert rep.fast_blocks > 0


@pytest.mark.parametrize("block_size", BLOCK_SIZES)
@pytest.mark.parametrize("kind", ["epoch_s", "epoch_ms"])
def test_epoch_with_a_stray_magnitude_later(config, tmp_path, kind, block_size):
    t0 = datetime(2026, 1, 5, tzinfo=UTC).timestamp()
    scale = 1000 if kind == "epoch_ms" else 1
    rows = [f"{(t0 + k) * scale!r},{TAGS[k % 3]},{15 + k * 1e-4!r}" for k in range(2000)]
    bad_line = 1500 + 2  # header is line 1, row k is line k + 2
    rows[1500] = f"{(t0 + 1500) * (1 if scale == 1000 else 1000)!r},HP-MS-P1,15"  # the other magnitude
    p = tmp_path / "e.csv"
    p.write_text("timestamp,tag,value\r\n" + "\r\n".join(rows) + "\r\n")
    for declared in ("auto", kind):
        fast, slow = _both(config, p, block_size, timestamps=declared)
        _assert_same(fast, slow)
        rep = fast[1]
        assert rep.time.kind == kind and rep.bad_rows == 1
        assert rep.errors[0].startswith(f"{p}:{bad_line}: timestamp ")


@pytest.mark.parametrize("block_size", BLOCK_SIZES)
def test_wide_gzip_with_gaps_and_bad_cells(config, tmp_path, block_size):
    rng = random.Random(7)
    t0 = datetime(2026, 3, 29, tzinfo=UTC)
    lines = ["timestamp,HP-MS-P1,NOT-A-TAG,HP-MS-T1"]
    expect = {}
    for k in range(3000):
        stamp = (t0 + timedelta(seconds=5 * k)).isoformat()
        p1 = "" if rng.random() < 0.2 else f"{15 + rng.uniform(-1, 1):.4f}"
        t1 = f" {540 + rng.uniform(-2, 2)!r} "
        other = "x" if rng.random() < 0.1 else "1"  # an unknown column's content is never read
        if 1000 <= k < 1100 and rng.random() < 0.3:
            bad = rng.randrange(3)
            if bad == 0:
                lines.append(f"{stamp},{p1},{other}")  # too few fields
                expect[len(lines)] = "3 fields; expected 4 fields"
                continue
            if bad == 1:
                t1 = "hot"
                expect[len(lines) + 1] = "value 'hot' of tag 'HP-MS-T1' is not a number"
            else:
                lines.append("")
                continue
        lines.append(f"{stamp},{p1},{other},{t1}")
    p = tmp_path / "w.csv.gz"
    with gzip.open(p, "wt") as f:
        f.write("\n".join(lines) + "\n")
    fast, slow = _both(config, p, block_size)
    _assert_same(fast, slow)
    rep = fast[1]
    assert rep.layout == "wide" and rep.bad_rows == len(expect)
    if block_size <= 4096:
        assert rep.fast_blocks > 0 and rep.slow_blocks > 0
    _check_named(rep, p, expect)


def test_millisecond_trap_refused_on_both_paths(config, tmp_path):
    t_ms = int(datetime(2026, 1, 5, tzinfo=UTC).timestamp() * 1000)
    p = tmp_path / "ms.csv"
    p.write_text("timestamp,tag,value\n" + "".join(f"{t_ms + k},HP-MS-P1,15\n" for k in range(500)))
    for fast in (True, False):
        with pytest.raises(HistoryError, match="declared epoch_s but their magnitude says milliseconds"):
            read_samples(HistoryReader(config, timestamps="epoch_s", fast=fast), [p])


def test_clean_file_takes_the_fast_path(config, tmp_path):
    t0 = datetime(2026, 1, 5, tzinfo=UTC).timestamp()
    p = tmp_path / "clean.csv"
    p.write_text("# exported by a historian\ntimestamp,tag,value\n"
                 + "".join(f"{t0 + k!r},{TAGS[k % 3]},{15 + k * 1e-4!r}\n" for k in range(5000)))
    r = HistoryReader(config, block_size=8192)
    s = read_samples(r, [p])
    rep = r.reports[str(p)]
    assert len(s) == 5000 and rep.slow_blocks == 0 and rep.fast_blocks > 5
    assert s.t[0] == t0 and s.t[-1] == t0 + 4999
    # MPa(g) + standard atmosphere (unit definition)
    assert s.value[0] == pytest.approx(15.0e6 + 101325.0)
