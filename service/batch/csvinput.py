"""CSV input of batch runs, read by the same rule as every other CSV the service reads.

The API and the per-file commands read a star table from CSV by one rule
(:mod:`service.api.csvio`, :mod:`service.api.tables`): a header row whose names are all
different; every row with as many cells as the header (blank lines skipped); an empty cell
is unknown; any other cell of a number column is a number written as
:data:`service.numbers.DECIMAL_TEXT` says (ASCII digits, no underscores). Left to its
defaults, pandas (which ``dask.dataframe.read_csv`` calls on each block of the file) is
looser: it reads "nan", "NA", "N/A", "null" and a dozen other words as unknown, fills the
missing cells of a short row with unknowns, ignores the cells a row has beyond the header
when only some columns are read, and renames the second of two columns with the same name
(``ra_deg.1``) so that one of them is silently not used.

:func:`read_csv` opens CSV input with a reader of its own, :func:`read_block`, which refuses
all of that while pandas does the parsing, at little cost:

1. Only an empty cell is unknown (``keep_default_na=False, na_values=[""]``): "nan" and the
   other words are then text in a column read as float64, which pandas refuses to convert.
   Underscores ("1_000") and other scripts' digits are refused by pandas' own parser.
2. The header's names are checked for duplicates and empty names (each block starts with a
   header line).
3. Cells per row. pandas pads a short row with empty cells, so the missing ones cannot be
   told from empty ones after parsing; the text is checked instead. When every column of
   the file is read, pandas itself refuses a row with more cells than the header (except
   the first, checked here), and a short row then shows in one count of the block's commas
   against the rows pandas read (numpy, at memory speed). When some columns are not read
   (``usecols``, which turns pandas' check off), the commas of each row are counted with
   numpy (a few passes over the bytes: this costs more). Commas and newlines inside quoted
   cells are left out; where quotes are not only around whole cells, or a carriage return
   ends a line on its own, the rows are read one by one with Python's csv module (slow).

A problem found in a block (or pandas refusing a cell) is then located in that block by a
scan with Python's csv module and raised as :class:`CsvRowError`, which names the row by its
text; :func:`describe` finds that row in the input files to name the file and the line.
Infinite values ("inf", "1e999") are read as pandas reads them, as for Parquet input: such
rows are not computed and are flagged ``value_out_of_range``.
"""

from __future__ import annotations

import csv
import io

import numpy as np

from ..numbers import DECIMAL_TEXT, WHOLE_TEXT

#: How pandas is told to read cells: only an empty cell is unknown (NaN).
NA_OPTIONS = {"keep_default_na": False, "na_values": [""]}

#: Spellings of infinity pandas' C parser reads as numbers (case does not matter).
INFINITY_WORDS = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})

#: Bytes read from the start of a file to locate a problem in its first rows.
HEAD_BYTES = 1 << 20

#: Bytes of a block looked at for its first row (pandas does not check that one's cells).
FIRST_ROW_BYTES = 1 << 16

#: Bytes read at a time when looking for a row in the input files.
SEARCH_CHUNK = 1 << 24

#: Characters of a row's text shown in a message when its line cannot be found.
SHOWN_ROW_CHARS = 120

_COMMA, _NEWLINE, _RETURN, _QUOTE = 44, 10, 13, b'"'


class CsvRowError(ValueError):
    """A row or the header of CSV input that is refused, named by its text.

    Raised where a block of the input is read (on a worker, without its file name or its
    place in the file); :func:`describe` turns it into a message with file and line.

    Attributes
    ----------
    message : str
        What is wrong, without file, line or column.
    line : bytes
        The text of the row's (first) line, without its line end.
    column : str or None
        The column of the refused cell, if it is one cell.
    """

    def __init__(self, message: str, line: bytes = b"", column: str | None = None):
        super().__init__(message, line, column)
        self.message = message
        self.line = line
        self.column = column

    def __str__(self) -> str:
        where = f"column {self.column!r}: " if self.column else ""
        return f"{where}{self.message} (row: {_shown(self.line)})"


def read_csv(source, *, blocksize=None, **kwargs):
    """``dask.dataframe.read_csv`` with :func:`read_block` as the reader of each block.

    ``kwargs`` go to pandas (``usecols``, ``dtype``); the cells' rule (:data:`NA_OPTIONS`)
    is added here.
    """
    # dask.dataframe.read_csv is this same function made with pandas.read_csv as the reader;
    # make_reader gives the same options (blocks, globs, compression, storage options).
    from dask.dataframe.io.csv import make_reader

    reader = make_reader(read_block, "read_csv", "CSV")
    if blocksize is not None:
        kwargs["blocksize"] = blocksize
    return reader(source, **NA_OPTIONS, **kwargs)


def read_block(source, **kwargs):
    """pandas.read_csv on one block of CSV text (header line first), refusing what the
    rest of the service refuses; raises :class:`CsvRowError` (see the module notes).

    Called by dask for every block, and once on a sample of the first file (with
    ``nrows``) to find the columns and their types.
    """
    import pandas as pd

    data = source.getvalue() if isinstance(source, io.BytesIO) else source.read()
    kwargs = dict(kwargs)
    kwargs.setdefault("index_col", False)
    rules = _cell_rules(kwargs.get("dtype"))
    header_end = _header_end(data)
    names = _header_names(data[:header_end])
    seen: set = set()
    for k, name in enumerate(names, start=1):
        if not name:  # as the API refuses it (pandas would name it "Unnamed: k")
            raise CsvRowError(
                f"column {k} of the header has no name (a trailing comma?)",
                data[:header_end].rstrip(b"\r"),
            )
        if name in seen:
            raise CsvRowError(
                f"column {name!r} is given twice in the header",
                data[:header_end].rstrip(b"\r"),
            )
        seen.add(name)
    n = len(names)
    body = header_end + 1
    head = kwargs.get("nrows") is not None  # the sample: its last line may be cut short
    usecols = kwargs.pop("usecols", None)
    every_column = usecols is None or set(usecols) == set(names)
    if head:
        _raise_first_problem(data, rules, limit=kwargs.get("nrows"))
    elif every_column:
        # pandas refuses a longer row itself, except the first one (taken as an index).
        first_rows = data[: _line_end(data, min(len(data), body + FIRST_ROW_BYTES)) + 1]
        _raise_first_problem(first_rows, {}, limit=1)
    elif not _cells_per_line_exact(data, body, n - 1):
        _raise_first_problem(data, rules)
    if not every_column:
        kwargs["usecols"] = usecols
    try:
        frame = pd.read_csv(io.BytesIO(data), **kwargs)
    except (ValueError, TypeError):
        # A cell pandas cannot convert (TypeError for "12.5" in a nullable integer column),
        # or (every column read) a row that is too long.
        _raise_first_problem(data, rules)
        raise
    if every_column and not head:
        commas = _comma_count(data, body)
        if commas is None:  # quotes not only around whole cells: row by row
            _raise_first_problem(data, {})
        elif commas != len(frame) * (n - 1):  # a short row (pandas padded it)
            _raise_first_problem(data, rules)
    return frame  # its columns in the file's order, as pandas gives them with usecols


def _line_end(data: bytes, start: int) -> int:
    """Index of the newline ending the line that starts at ``start`` (len(data) if none)."""
    end = data.find(b"\n", start)
    return len(data) if end < 0 else end


def _header_end(data: bytes) -> int:
    """Index of the line end after the header line (a newline, or a bare carriage return)."""
    end = _line_end(data, 0)
    cr = data.find(b"\r", 0, end)
    if cr >= 0 and data[cr + 1 : cr + 2] != b"\n":
        return cr
    return end


def _header_names(line: bytes) -> list[str]:
    text = line.decode("utf-8", "surrogateescape").removeprefix("\ufeff")
    return next(csv.reader([text.rstrip("\r")]), [])


def is_nullable_int(dtype) -> bool:
    """pandas' nullable integers (Int64, UInt64, ...), as kept whole-number columns are read."""
    return not isinstance(dtype, np.dtype) and getattr(
        getattr(dtype, "numpy_dtype", None), "kind", ""
    ) in ("i", "u")


def _cell_rules(dtypes) -> dict:
    """Column -> "number", "whole" or "whole_or_empty" (pandas' nullable integers, for
    kept columns) for the columns pandas is told to read as numbers."""
    rules: dict = {}
    for name, dtype in dtypes.items() if isinstance(dtypes, dict) else ():
        try:
            kind = np.dtype(dtype).kind
        except TypeError:  # a pandas extension dtype: nullable integers, else text (no rule)
            if is_nullable_int(dtype):
                rules[name] = "whole_or_empty"
            continue
        if kind == "f":
            rules[name] = "number"
        elif kind in "iu":
            rules[name] = "whole"
    return rules


def _comma_count(data: bytes, start: int) -> int | None:
    """Commas from ``start`` that separate cells (not inside a quoted cell); None when the
    quotes are not only around whole cells."""
    if data.find(_QUOTE, start) < 0:  # the usual case: one count at memory speed
        return int(np.count_nonzero(np.frombuffer(data, np.uint8)[start:] == _COMMA))
    found = _delimiters(data, start, rows=False)
    return None if found is None else found[0].size


def _delimiters(data: bytes, start: int, rows: bool = True):
    """Positions (from ``start``) of the commas and newlines that separate cells and rows,
    leaving out those inside quoted cells; None when a quote is not at the start or end of
    a cell (or part of a doubled quote inside one), where only a CSV reader can tell.
    ``rows=False``: the commas only (the newlines' positions are then empty)."""
    body = np.frombuffer(data, np.uint8)[start:]
    commas = np.flatnonzero(body == _COMMA)
    newlines = np.flatnonzero(body == _NEWLINE) if rows else commas[:0]
    if data.find(_QUOTE, start) < 0:
        return commas, newlines
    quotes = np.flatnonzero(body == ord(_QUOTE))
    if quotes.size % 2:
        return None
    opens, closes = quotes[0::2], quotes[1::2]
    doubled = opens[1:] == closes[:-1] + 1  # "" inside a quoted cell: a close, then an open
    ends_cell = (_COMMA, _NEWLINE, _RETURN)
    before = body[np.maximum(opens - 1, 0)]
    after = body[np.minimum(closes + 1, body.size - 1)]
    opens_ok = np.isin(before, ends_cell) | (opens == 0)
    opens_ok[1:] |= doubled
    closes_ok = np.isin(after, ends_cell) | (closes == body.size - 1)
    closes_ok[:-1] |= doubled
    if not (opens_ok.all() and closes_ok.all()):
        return None

    def outside(positions):
        # Inside a quoted cell: an odd number of quotes before (quotes come in pairs).
        first, last = np.searchsorted(positions, opens), np.searchsorted(positions, closes)
        if (first == last).all():
            return positions  # no comma or newline in any quoted cell (the usual case)
        m = positions.size + 1
        depth = np.cumsum(np.bincount(first, minlength=m) - np.bincount(last, minlength=m))
        return positions[depth[:-1] == 0]

    return outside(commas), outside(newlines)


def _cells_per_line_exact(data: bytes, start: int, commas: int) -> bool:
    """Whether every non-blank row from ``start`` has exactly ``commas`` commas: numpy
    passes over the bytes. False (the caller then reads row by row) also where that cannot
    be told so: a carriage return ending a line on its own, quotes inside cells."""
    body = np.frombuffer(data, np.uint8)[start:]
    if body.size == 0:
        return True
    found = _delimiters(data, start)
    if found is None:
        return False
    separators, ends = found
    if data.find(b"\r", start) >= 0:
        crlf = np.count_nonzero(body[ends[ends > 0] - 1] == _RETURN)
        if np.count_nonzero(body == _RETURN) != crlf:
            return False  # a carriage return that is not part of a CRLF line end
    if body[-1] != _NEWLINE:
        ends = np.append(ends, body.size)
    starts = np.empty_like(ends)
    starts[0] = 0
    starts[1:] = ends[:-1] + 1
    length = ends - starts
    blank = (length == 0) | ((length == 1) & (body[np.minimum(starts, body.size - 1)] == _RETURN))
    if blank.any():
        starts, ends = starts[~blank], ends[~blank]
    if separators.size != commas * starts.size:
        return False
    if commas == 0 or starts.size == 0:
        return True
    # Sorted positions: the first and last comma of each group of `commas` in its own row.
    return bool(
        (separators[::commas] >= starts).all() and (separators[commas - 1 :: commas] < ends).all()
    )


def _raise_first_problem(data: bytes, rules: dict, limit: int | None = None) -> None:
    found = first_problem(data, rules, limit=limit)
    if found is not None:
        _, line, message, column = found
        raise CsvRowError(message, line, column)


def first_problem(data: bytes, rules: dict, limit: int | None = None):
    """The first row of CSV text (header line first) that the service's rule refuses.

    Parameters
    ----------
    data : bytes
        CSV text, UTF-8, beginning with the header line.
    rules : dict
        Column -> "number" (an empty cell or a number, :data:`DECIMAL_TEXT`, or a spelling
        of infinity pandas reads) or "whole" (:data:`WHOLE_TEXT`).
    limit : int, optional
        Rows to look at (all by default).

    Returns
    -------
    tuple or None
        (index of the row's first line in ``data``, from 0; the line's text as bytes;
        what is wrong; the column, or None), or None when nothing is wrong.
    """
    text = data.decode("utf-8", "surrogateescape")
    lines = io.StringIO(text, newline="").readlines()
    if lines:
        lines[0] = lines[0].removeprefix("\ufeff")

    def raw(k: int) -> bytes:
        return lines[k].rstrip("\r\n").encode("utf-8", "surrogateescape")

    not_utf8 = not text.isascii() and _has_surrogates(text)
    reader = csv.reader(lines)
    try:
        header = next(reader, [])
        n = len(header)
        checks = [
            (name, header.index(name), kind) for name, kind in rules.items() if name in header
        ]
        last, rows = reader.line_num, 0
        for row in reader:
            start, last = last, reader.line_num
            if not row or (len(row) == 1 and not row[0].strip(" \t")):
                continue  # blank lines are skipped (as pandas and the API skip them)
            if not_utf8 and _has_surrogates("".join(row)):
                return start, raw(start), "the row is not UTF-8 text", None
            if len(row) != n:
                return start, raw(start), f"row has {len(row)} cells; the header has {n}", None
            for name, k, kind in checks:
                problem = cell_problem(row[k], kind)
                if problem:
                    return start, raw(start), problem, name
            rows += 1
            if limit is not None and rows >= limit:
                break
    except csv.Error as exc:
        start = min(max(reader.line_num - 1, 0), len(lines) - 1)
        return start, raw(start), f"the row cannot be read as CSV ({exc})", None
    return None


def _has_surrogates(text: str) -> bool:
    """Whether text decoded with surrogateescape holds bytes that were not UTF-8."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


def cell_problem(cell: str, kind: str) -> str | None:
    """What is wrong with one cell of a number column (None if nothing)."""
    text = cell.strip(" \t")  # pandas reads a number with blanks around it
    if kind in ("whole", "whole_or_empty"):
        # pandas reads a whole-number column's "5.0" or "5e0" as 5.
        if WHOLE_TEXT.match(text) or (DECIMAL_TEXT.match(text) and float(text).is_integer()):
            return None
        if not cell and kind == "whole_or_empty":
            return None  # a kept column's unknown value (a star without that identifier)
        if not cell:
            return "the cell is empty, where the first rows of the file have whole numbers"
        return f"{cell!r} is not a whole number (the first rows of the file have whole numbers)"
    if not cell or DECIMAL_TEXT.match(text) or text.lower() in INFINITY_WORDS:
        return None
    if not text.isascii() or "_" in text:
        return f"{cell!r} is not a number written with ASCII digits and no underscores"
    return f"{cell!r} is not a number; leave the cell empty for an unknown value"


def describe(source, error: CsvRowError, column_note=None) -> str:
    """One line for a refused row: the file and line where its text is (first found), what
    is wrong and, for a cell, the column (``column_note(column)`` may add to its name)."""
    found = find_line(source, error.line)
    where = f"{found[0]}: line {found[1]}" if found else f"{source}"
    what = error.message
    if error.column:
        note = column_note(error.column) if column_note else ""
        what = f"column {error.column!r}{note}: {what}"
    if found is None:
        what += f" (row: {_shown(error.line)})"
    return f"{where}: {what}"


def _shown(line: bytes) -> str:
    text = line.decode("utf-8", "backslashreplace")
    if len(text) > SHOWN_ROW_CHARS:
        text = text[:SHOWN_ROW_CHARS] + "..."
    return repr(text)


def input_files(source):
    """The input's files in the order dask reads them (fsspec, compression inferred)."""
    from fsspec.core import open_files

    return open_files(source if isinstance(source, list | tuple) else str(source), mode="rb",
                      compression="infer")  # fmt: skip


def find_line(source, line: bytes):
    """(file, line number from 1) of the first line whose text is ``line``, or None.

    A plain byte search through the input files in order (no CSV parsing), so a row found
    failing far into a large input is named without reading it again as CSV.
    """
    if not line:
        return None
    try:
        files = input_files(source)
    except (OSError, ValueError):
        return None
    for handle in files:
        try:
            with handle as stream:
                number = _line_number(stream, line)
        except (OSError, ValueError):
            return None
        if number is not None:
            return _path_shown(source, handle), number
    return None


def _path_shown(source, handle) -> str:
    """A file as the user named it when the input is that one file, else its full path."""
    if not isinstance(source, list | tuple):
        try:
            if handle.fs._strip_protocol(str(source)) == handle.path:
                return str(source)
        except (AttributeError, TypeError, ValueError):  # pragma: no cover - other fsspec
            pass
    return handle.path


def _line_number(stream, line: bytes) -> int | None:
    """Line number of the first line of ``stream`` whose text is ``line``."""
    needle = b"\n" + line
    buf = b"\n"  # a line end before the first line, so that it matches like the others
    newlines_before = -1  # that line end is not the file's
    while True:
        chunk = stream.read(SEARCH_CHUNK)
        buf += chunk
        at = buf.find(needle)
        while at >= 0:
            end = at + len(needle)
            if end == len(buf) and chunk:
                break  # its line end is in the next chunk
            if end == len(buf) or buf[end : end + 1] in (b"\n", b"\r"):
                return newlines_before + buf.count(b"\n", 0, at + 1) + 1
            at = buf.find(needle, at + 1)
        if not chunk:
            return None
        cut = max(len(buf) - len(needle), 0)
        newlines_before += buf.count(b"\n", 0, cut)
        buf = buf[cut:]


def _first_file_head(source, size: int = HEAD_BYTES):
    """(first file of the input, its first ``size`` bytes), or None if there is none or it
    cannot be read (the run itself then says why)."""
    try:
        files = input_files(source)
        if not files:
            return None
        with files[0] as stream:
            return files[0], stream.read(size)
    except (OSError, ValueError):
        return None


def first_file_has_no_rows(source) -> bool:
    """Whether the input's first file holds a header and nothing after it but blank lines:
    the columns' types read from it (text, for a column without cells) say nothing."""
    head = _first_file_head(source, HEAD_BYTES + 1)
    if head is None or len(head[1]) > HEAD_BYTES:
        return False
    data = head[1]
    end = _header_end(data)
    return end >= len(data) or not data[end + 1 :].strip(b" \t\r\n")


#: Data rows from which dask types the columns (``dask.dataframe.read_csv``'s sample_rows).
SAMPLE_ROWS = 10


def columns_without_cells(source, columns) -> set:
    """Those of ``columns`` whose every cell is empty in the first SAMPLE_ROWS rows of the
    input's first file: the float64 type they get from those rows says nothing of the
    cells that follow (an identifier column whose first stars have none)."""
    head = _first_file_head(source) if columns else None
    if head is None:
        return set()
    text = head[1].decode("utf-8", "surrogateescape").removeprefix("\ufeff")
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader, [])
        where = {name: k for k, name in enumerate(header) if name in columns}
        filled: set = set()
        rows = 0
        for row in reader:
            if not row or (len(row) == 1 and not row[0].strip(" \t")):
                continue  # blank lines: skipped, as pandas skips them
            filled.update(name for name, k in where.items() if k < len(row) and row[k])
            rows += 1
            if rows == SAMPLE_ROWS:
                break
    except csv.Error:
        return set()
    return set(where) - filled


def head_problem(source, column: str):
    """The first problem in the first rows of the input's first file, ``column`` read as
    numbers: (file, line number, what is wrong, the column or None for a whole row), or
    None."""
    head = _first_file_head(source)
    if head is None:
        return None
    first, data = head
    data = data[: data.rfind(b"\n") + 1] or data
    found = first_problem(data, {column: "number"})
    if found is None:
        return None
    start, _, message, where = found
    return _path_shown(source, first), start + 1, message, where
