"""Byte blocks of a CSV export and the vectorised split of a clean block.

The CSV reader works on blocks of whole lines cut from the (possibly gzip)
byte stream, so memory is bounded by one block and the file line of every row
is known. Each block is first split in one vectorised pass by pyarrow's CSV
parser (:func:`split_clean`); a block the fast split cannot take exactly as the
line-by-line path would (a blank or comment line, a row with the wrong number
of fields, a value that is not a number, bytes that are not UTF-8) is handed back whole, and the caller
reads it line by line, which names every bad row by its file line.

Line ends are ``\\n``, ``\\r\\n`` or a lone ``\\r``, as pyarrow's CSV reader has
them. A block never ends inside a ``\\r\\n`` pair.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv

UTF8_BOM = b"\xef\xbb\xbf"
FIELD_TRIM = ' "\t'  # characters trimmed from each field (as the line-by-line path does)
PARSE_BLOCK = 1 << 20  # pyarrow parses a block in pieces of this size (faster than one piece: measured)
_LINE_END = re.compile(rb"\r\n|\n|\r")
_COMMENT = re.compile(rb"(?:^|[\r\n])[ \t]*#")


def blocks(stream: Any, size: int) -> Iterator[bytes]:
    """Blocks of about ``size`` bytes of ``stream``, each ending at a line end (the last one at EOF)."""
    rest = b""
    while True:
        chunk = stream.read(size)
        if not chunk:
            if rest:
                yield rest
            return
        cut = chunk.rfind(b"\n") + 1
        if cut == 0:  # lone-\r line ends; a final \r may be the first half of \r\n
            cut = chunk.rfind(b"\r", 0, len(chunk) - 1) + 1
        if cut == 0:  # no line end in this chunk: a long line, keep reading
            rest += chunk
            continue
        if cut == len(chunk):
            block = rest + chunk if rest else chunk
        else:
            block = b"".join((rest, memoryview(chunk)[:cut]))  # one copy
        rest = chunk[cut:]
        yield block


def header_end(data: bytes, file_start: bool) -> int | None:
    """Offset just past the first line that is neither blank nor a ``#`` comment (the header), or None."""
    pos = 0
    while pos < len(data):
        m = _LINE_END.search(data, pos)
        stop = m.start() if m else len(data)
        line = data[pos:stop]
        if file_start and pos == 0 and line.startswith(UTF8_BOM):
            line = line[len(UTF8_BOM):]
        text = line.strip(b" \t\r")
        if text and not text.startswith(b"#"):
            return m.end() if m else len(data)
        if m is None:
            return None
        pos = m.end()
    return None


def has_comment(data: bytes) -> bool:
    """Whether a line of ``data`` starts (after blanks) with ``#``."""
    return b"#" in data and _COMMENT.search(data) is not None


def split_clean(data: bytes, n_columns: int, numeric: frozenset[int] = frozenset(), empty_is_null: bool = False,
                skip: frozenset[int] = frozenset()) -> list[pa.Array | None] | None:
    """Columns of a block whose every line has ``n_columns`` fields, or None.

    None when the block holds a blank or comment line, a row with another
    number of fields, a number the parser refuses, or text that is not UTF-8:
    the caller then reads the block line by line, which says what is wrong
    where. Fields are cut at every comma (quotes are not special); text fields
    are trimmed of blanks and double quotes, exactly as the line-by-line path
    does.

    Parameters
    ----------
    n_columns : int
        Fields per line (the header's).
    numeric : set of int
        Columns parsed as float64 (blanks around the number allowed, as the
        line-by-line path trims them); the others are text.
    empty_is_null : bool
        An empty numeric field is null (a wide file's "no sample"); otherwise it
        refuses the block.
    skip : set of int
        Columns the caller does not use: checked for their field count only,
        ``None`` in the result.
    """
    if has_comment(data):
        return None
    names = [f"c{j}" for j in range(n_columns)]
    used = [names[j] for j in range(n_columns) if j not in skip]
    types = {names[j]: (pa.float64() if j in numeric else pa.string()) for j in range(n_columns)}
    try:
        table = pcsv.open_csv(
            pa.py_buffer(data),
            read_options=pcsv.ReadOptions(column_names=names, block_size=PARSE_BLOCK),
            parse_options=pcsv.ParseOptions(delimiter=",", quote_char=False, escape_char=False,
                                            ignore_empty_lines=False, newlines_in_values=False),
            convert_options=pcsv.ConvertOptions(column_types=types, include_columns=used,
                                                null_values=[""] if empty_is_null else [],
                                                strings_can_be_null=False, quoted_strings_can_be_null=False),
        ).read_all()
    except pa.ArrowInvalid:
        return None
    first = table.column(0).combine_chunks()
    if len(first) and pc.min(pc.binary_length(first)).as_py() == 0:
        return None  # a blank line (pyarrow makes it a row of empty fields) or a row without a timestamp
    trim = b" " in data or b'"' in data or b"\t" in data
    cols: list[pa.Array | None] = []
    for j, name in enumerate(names):
        if j in skip:
            cols.append(None)
            continue
        c = first if j == 0 else table.column(name).combine_chunks()
        cols.append(c if j in numeric or not trim else pc.utf8_trim(c, characters=FIELD_TRIM))
    return cols


def split_lines(data: bytes, block_size: int) -> pa.Array:
    """Every line of ``data`` as one string (blank lines included), for the line-by-line path."""
    if not data.endswith((b"\n", b"\r")):
        data += b"\n"  # pyarrow cannot count the fields of an unterminated single line
    table = pcsv.read_csv(
        pa.py_buffer(data),
        read_options=pcsv.ReadOptions(block_size=max(block_size, len(data), 1 << 16),
                                      autogenerate_column_names=True),
        parse_options=pcsv.ParseOptions(delimiter="\x01", quote_char=False, escape_char=False,
                                        ignore_empty_lines=False, newlines_in_values=False),
        convert_options=pcsv.ConvertOptions(column_types={"f0": pa.string()}, strings_can_be_null=False,
                                            quoted_strings_can_be_null=False),
    )
    return table.column(0).combine_chunks()
