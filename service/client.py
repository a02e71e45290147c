"""Python client for the Skydrift HTTP API. Needs only ``requests``.

>>> from service.client import Client
>>> with Client("http://127.0.0.1:8000") as sky:                      # doctest: +SKIP
...     answer = sky.propagate(stars, catalogue_epoch="J2016.0", target_epochs=["now"])

What it does for you:

* one ``requests.Session`` per client, so connections are reused;
* a timeout on every request (connect, read), seconds;
* retries with exponential backoff on 429, 502, 503 and 504 answers and on failed
  connections, waiting as long as a ``Retry-After`` header asks (capped); every endpoint is
  a pure computation, so repeating a request is safe;
* large inputs split into requests of ``batch_size`` stars, the answers joined in order (star
  ``index`` values count from the start of your input, as if sent at once; an epoch given as
  "now" is then read once from this machine's clock, so that every request means one
  instant); a batch the service refuses for a limit that fewer stars cure (a 413 naming
  SKYDRIFT_MAX_STARS, SKYDRIFT_MAX_RESULTS for stars x epochs or instants, default
  2,000,000, or SKYDRIFT_MAX_BODY_BYTES) is sent again in smaller batches (the star limit
  it names, or halves), and the rest of the call in batches of that size, so that
  ``batch_size`` need not be matched to the service's limits or the number of epochs;
* errors raised as :class:`SkydriftError` with the problem details (status, title, detail
  and the list of offending fields).

Stars may be a list of records (dicts) or a dict of columns (lists or anything with
``tolist()``, such as numpy arrays); NaN or None means unknown. Answers are the service's
JSON, as Python dicts.

This module imports nothing heavy (no numpy, Flask or astropy), so it can be copied into
any script that has ``requests``.
"""

from __future__ import annotations

import csv
import email.utils
import gc
import io
import json
import math
import random
import re
import time
import urllib.parse
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import requests

from .numbers import WHOLE_TEXT

__all__ = ["Client", "FieldError", "SkydriftError", "DEFAULT_URL"]

DEFAULT_URL = "http://127.0.0.1:8000"

#: Most stars per boundary-crossing request (the search costs far more per star).
CROSSING_BATCH_SIZE = 500

#: Longest request line (method, path and query string, protocol), bytes, that the service
#: reads: gunicorn's limit_request_line, 8190 by default and in deploy/gunicorn.conf.py
#: (beyond it gunicorn answers 414 without reaching the service). CSV and Arrow bodies
#: carry their options, epochs among them, in the query string.
MAX_REQUEST_LINE_BYTES = 8190

#: Answers worth repeating: rate limited, overloaded or briefly unavailable upstream.
RETRY_STATUSES = (429, 502, 503, 504)

Stars = Sequence[Mapping[str, Any]] | Mapping[str, Sequence[Any]]
Epoch = str | float
Progress = Callable[[int], None]


@dataclass(frozen=True)
class FieldError:
    """One offending value: its path (``stars[3].dec_deg`` or ``line 7: dec_deg``)."""

    field: str
    message: str

    def __str__(self) -> str:
        return f"{self.field}: {self.message}"


@dataclass
class SkydriftError(Exception):
    """An error answer (RFC 9457 problem details) or a service that could not be reached.

    Attributes
    ----------
    status : int or None
        HTTP status; None when no answer came (connection failed).
    title, detail : str
        The problem's title and detail.
    errors : list of FieldError
        The offending fields, if the service listed them.
    request_id : str or None
        The service's request id, to quote when asking about a failure.
    retry_after_s : float or None
        For 429/503 answers after the last retry: how long the service asked to wait.
    """

    status: int | None
    title: str
    detail: str = ""
    errors: list[FieldError] = field(default_factory=list)
    request_id: str | None = None
    retry_after_s: float | None = None

    def __post_init__(self):
        super().__init__(str(self))

    def __str__(self) -> str:
        head = f"{self.status} {self.title}" if self.status else self.title
        text = f"{head}: {self.detail}" if self.detail else head
        if self.errors:
            text += "\n" + "\n".join(f"  {e}" for e in self.errors)
        return text

    @classmethod
    def from_response(cls, resp: requests.Response) -> SkydriftError:
        """Build from an error answer (problem+json, or whatever else came back)."""
        try:
            body = resp.json()
        except ValueError:
            body = None
        if not isinstance(body, dict):
            return cls(
                resp.status_code,
                resp.reason or "Error",
                resp.text[:500].strip(),
                request_id=resp.headers.get("X-Request-ID"),
                retry_after_s=_retry_after_s(resp),
            )
        errors = [
            FieldError(str(e.get("field", "")), str(e.get("message", "")))
            for e in body.get("errors") or []
            if isinstance(e, dict)
        ]
        return cls(
            int(body.get("status") or resp.status_code),
            str(body.get("title") or resp.reason or "Error"),
            str(body.get("detail") or ""),
            errors,
            body.get("request_id") or resp.headers.get("X-Request-ID"),
            _retry_after_s(resp),
        )


def _retry_after_s(resp: requests.Response) -> float | None:
    """The Retry-After header in seconds (delay-seconds or an HTTP date), or None."""
    value = resp.headers.get("Retry-After")
    if not value:
        return None
    value = value.strip()
    if value.isdigit():
        return float(value)
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when is None:
        return None
    return max(0.0, when.timestamp() - time.time())


def _clean(value):
    """NaN and infinities -> None (unknown), tuples -> lists, arrays -> lists."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if hasattr(value, "tolist"):
        return _clean(value.tolist())
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    return value


def _default(value):
    """JSON for array-likes (numpy arrays and scalars): their ``tolist()``."""
    if hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} cannot be sent as JSON")


#: Answers at least this large are decoded with orjson if it is installed (it is with the
#: service; imported only then, so that the module alone needs nothing but requests) and
#: with the cyclic garbage collector paused.
_LARGE_ANSWER_BYTES = 1 << 20


#: Media types of the service's JSON answers (GeoJSON outlines among them).
JSON_ANSWERS = ("application/json", "application/geo+json")


#: The service setting that limits stars x epochs (or instants) per request.
RESULTS_LIMIT_SETTING = "SKYDRIFT_MAX_RESULTS"
#: The service setting that limits the stars of one request.
STARS_LIMIT_SETTING = "SKYDRIFT_MAX_STARS"
#: The service setting that limits the size of a request body.
BODY_LIMIT_SETTING = "SKYDRIFT_MAX_BODY_BYTES"


def _smaller_batch(exc: SkydriftError, sent: int) -> int | None:
    """The batch size to try next after ``exc`` refused a batch of ``sent`` stars, or None
    when fewer stars cannot cure the refusal (it is then raised as it is).

    Three limits of the service are cured by fewer stars per request, and it does not state
    them in advance (they may differ between the pods behind one address), so the client
    learns them from the refusal (413): too many stars (SKYDRIFT_MAX_STARS; the message
    gives the limit, which becomes the batch size), too many stars x epochs or instants
    (SKYDRIFT_MAX_RESULTS) or too large a body (SKYDRIFT_MAX_BODY_BYTES; both halve the
    batch). The rest of the call uses the smaller size. Anything else, such as too many
    epochs (SKYDRIFT_MAX_EPOCHS), is raised: no number of stars cures it.
    """
    if exc.status != 413 or sent <= 1:
        return None
    for e in exc.errors:
        if STARS_LIMIT_SETTING in e.message:
            limit = re.search(r"the limit is (\d+)", e.message)
            if limit and 1 <= int(limit.group(1)) < sent:
                return int(limit.group(1))
            return (sent + 1) // 2
        if RESULTS_LIMIT_SETTING in e.message:
            return (sent + 1) // 2
    if BODY_LIMIT_SETTING in (exc.detail or ""):
        return (sent + 1) // 2
    return None


def _whole(value) -> int:
    """A count given as a Python int or as text in ASCII digits ("11"; not "1_1")."""
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    if isinstance(value, str) and WHOLE_TEXT.match(value.strip()):
        return int(value.strip())
    raise ValueError(f"range count: {value!r} is not a whole number in ASCII digits")


def _loads(content: bytes):
    """Decode a JSON answer.

    A large answer holds millions of small objects (a list of flags per star); while they
    are being built the cyclic garbage collector would rescan them again and again, which
    more than doubles the decoding time of a million-star answer. None of them can form a
    cycle, so the collector is paused while a large answer is decoded.
    """
    if len(content) < _LARGE_ANSWER_BYTES:
        return json.loads(content)
    try:
        import orjson

        decode = orjson.loads
    except ImportError:  # pragma: no cover - the module copied alone
        decode = json.loads
    paused = gc.isenabled()
    if paused:
        gc.disable()
    try:
        return decode(content)
    finally:
        if paused:
            gc.enable()


def _dumps(body) -> str:
    """JSON text of a request body; NaN and infinities are sent as null (unknown).

    The common case (no NaN) is encoded directly; only a body that holds a NaN is walked
    to replace it.
    """
    try:
        return json.dumps(body, allow_nan=False, default=_default)
    except ValueError:
        return json.dumps(_clean(body), allow_nan=False, default=_default)


def _count(stars: Stars) -> int:
    if isinstance(stars, Mapping):
        lengths = {len(v) for v in stars.values()}
        if len(lengths) > 1:
            raise ValueError("all columns must have the same length")
        return lengths.pop() if lengths else 0
    return len(stars)


def _slice(stars: Stars, start: int, stop: int):
    if isinstance(stars, Mapping):
        return {k: v[start:stop] for k, v in stars.items()}
    return list(stars[start:stop])


def _offset_indices(items: list, offset: int) -> list:
    if not offset:
        return items
    return [dict(x, index=x["index"] + offset) if "index" in x else x for x in items]


def merge_answers(parts: list[dict], offsets: list[int]) -> dict:
    """Join the answers of consecutive batches into one, as if sent in one request.

    Lists of per-star objects (those with an ``index``) are concatenated with their indices
    shifted; ``columns`` are concatenated star-wise (per-epoch rows side by side);
    ``*_count`` numbers are summed; other objects are merged; anything else is taken from
    the first batch (epochs, units, model: the same in every batch).
    """
    out = dict(parts[0])
    out = {k: (list(v) if isinstance(v, list) else v) for k, v in out.items()}
    for part, offset in zip(parts[1:], offsets[1:], strict=True):
        for key, value in part.items():
            mine = out.get(key)
            if isinstance(value, list) and isinstance(mine, list):
                if all(isinstance(x, dict) and "index" in x for x in value + mine):
                    out[key] = mine + _offset_indices(value, offset)
            elif key == "columns" and isinstance(value, dict) and isinstance(mine, dict):
                out[key] = _join_columns(mine, value, offset, part.get("star_count"))
            elif key.endswith("_count") and isinstance(value, int) and isinstance(mine, int):
                out[key] = mine + value
            elif isinstance(value, dict) and isinstance(mine, dict):
                out[key] = {**mine, **value}
            elif key not in out:
                out[key] = value
    return out


def _join_columns(mine: dict, value: dict, n_mine: int, n_value: int | None) -> dict:
    """Columns of two consecutive batches, star-wise; a column one batch lacks (e.g. no
    star of it had uncertainties) is filled with nulls of that batch's shape."""

    def epochs_of(cols):
        return next(
            (len(v) for k, v in cols.items() if k != "flags" and v and isinstance(v[0], list)),
            None,
        )

    if n_value is None:
        n_value = next((len(v) for k, v in value.items() if k in ("id", "flags") and v), 0)
    m = epochs_of(mine) or epochs_of(value) or 0
    cols = {}
    for name in list(mine) + [n for n in value if n not in mine]:
        a, b = mine.get(name), value.get(name)
        two_d = name != "flags" and any(x and isinstance(x[0], list) for x in (a, b) if x)
        if a is None:
            a = [[None] * n_mine for _ in range(m)] if two_d else [None] * n_mine
        if b is None:
            b = [[None] * n_value for _ in range(m)] if two_d else [None] * n_value
        cols[name] = [ra + rb for ra, rb in zip(a, b, strict=True)] if two_d else a + b
    return cols


_LINE = re.compile(r"^line (\d+)(.*)$")


class Client:
    """A Skydrift API client.

    Parameters
    ----------
    base_url : str
        Where the service listens, e.g. ``http://127.0.0.1:8000``.
    timeout : float or (float, float)
        Seconds to wait for a connection and for an answer (one number: both).
    retries : int
        How many times to repeat a request after a retryable answer or failed connection.
    backoff_s : float
        First wait between attempts, seconds; doubled each time (with jitter), at most
        ``max_backoff_s``. A ``Retry-After`` header replaces it (at most
        ``max_retry_after_s``).
    batch_size : int
        Most stars sent in one request; larger inputs are split and the answers joined.
        Fewer when the service refuses a batch for a limit that fewer stars cure: its star
        limit (SKYDRIFT_MAX_STARS, taken as the batch size), its stars x epochs
        (SKYDRIFT_MAX_RESULTS) or its body size (SKYDRIFT_MAX_BODY_BYTES), which halve the
        batch until it is accepted (one wasted request per step).
    token : str, optional
        Bearer token for a service that requires one (sent as ``Authorization: Bearer``).
    headers : dict, optional
        Extra headers for every request.
    session : requests.Session, optional
        A session to use (default: a new one, closed by :meth:`close`).
    sleep : callable, optional
        Function used to wait (tests pass a recorder).
    max_request_line_bytes : int or None
        Longest request line the service reads (default :data:`MAX_REQUEST_LINE_BYTES`,
        gunicorn's); None: no limit (the in-process client of ``service.local``). A CSV or
        Arrow request whose options (epochs, instants) would not fit raises ValueError
        before anything is sent.
    """

    def __init__(
        self,
        base_url: str = DEFAULT_URL,
        *,
        timeout: float | tuple[float, float] = (5.0, 300.0),
        retries: int = 5,
        backoff_s: float = 0.5,
        max_backoff_s: float = 30.0,
        max_retry_after_s: float = 120.0,
        batch_size: int = 100_000,
        token: str | None = None,
        headers: Mapping[str, str] | None = None,
        session: requests.Session | None = None,
        sleep: Callable[[float], None] = time.sleep,
        max_request_line_bytes: int | None = MAX_REQUEST_LINE_BYTES,
    ):
        if batch_size < 1:
            raise ValueError("batch_size must be at least 1")
        self.base_url = base_url.rstrip("/")
        self.timeout = timeout
        self.retries = int(retries)
        self.backoff_s = float(backoff_s)
        self.max_backoff_s = float(max_backoff_s)
        self.max_retry_after_s = float(max_retry_after_s)
        self.batch_size = int(batch_size)
        self._own_session = session is None
        self.session = session or requests.Session()
        self.session.headers.update({"User-Agent": "skydrift-client"})
        if token:
            self.session.headers["Authorization"] = f"Bearer {token}"
        self.session.headers.update(dict(headers or {}))
        self._sleep = sleep
        self.max_request_line_bytes = max_request_line_bytes

    # ------------------------------------------------------------ plumbing

    def close(self) -> None:
        """Close the connections (only if the client made its own session)."""
        if self._own_session:
            self.session.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _wait_s(self, attempt: int, resp: requests.Response | None) -> float:
        if resp is not None:
            asked = _retry_after_s(resp)
            if asked is not None:
                return min(asked, self.max_retry_after_s)
        base = min(self.max_backoff_s, self.backoff_s * 2.0**attempt)
        return base * random.uniform(0.5, 1.0)

    def request(
        self, method: str, path: str, *, expect: tuple[str, ...] = (), **kwargs
    ) -> requests.Response:
        """Send one request with timeout and retries; raise SkydriftError unless 2xx, or
        when ``expect`` names media types (prefixes) and the answer is none of them (a
        proxy's page or another service on that address must not pass for an answer)."""
        url = self.base_url + path
        kwargs.setdefault("timeout", self.timeout)
        for attempt in range(self.retries + 1):
            try:
                resp = self.session.request(method, url, **kwargs)
            except (requests.ConnectionError, requests.exceptions.ChunkedEncodingError) as exc:
                # ChunkedEncodingError: the connection was cut in the middle of the answer
                # (requests reads the body after the headers), a failed connection too.
                if attempt == self.retries:
                    title = (
                        "Service unreachable"
                        if isinstance(exc, requests.ConnectionError)
                        else "Answer cut off"
                    )
                    raise SkydriftError(None, title, f"{url}: {exc}") from exc
                self._sleep(self._wait_s(attempt, None))
                continue
            except requests.Timeout as exc:
                # The service is computing; repeating would only add load.
                raise SkydriftError(None, "Timed out", f"{url}: {exc}") from exc
            if resp.status_code in RETRY_STATUSES and attempt < self.retries:
                self._sleep(self._wait_s(attempt, resp))
                continue
            if resp.status_code >= 400:
                raise SkydriftError.from_response(resp)
            media = resp.headers.get("Content-Type", "").split(";")[0].strip().lower()
            if expect and not media.startswith(expect):
                raise SkydriftError(
                    resp.status_code,
                    "Unexpected answer",
                    f"{url} answered {media or 'without a content type'}, not "
                    f"{' or '.join(expect)}: is a Skydrift service at that address?",
                )
            return resp
        raise AssertionError("unreachable")  # pragma: no cover

    def get(self, path: str, **params) -> dict:
        """GET a JSON answer."""
        resp = self.request("GET", path, params=params or None, expect=JSON_ANSWERS)
        return _loads(resp.content)

    def post(self, path: str, body: Mapping[str, Any]) -> dict:
        """POST a JSON body (NaN sent as null) and return the JSON answer."""
        data = _dumps(dict(body))
        resp = self.request(
            "POST", path, data=data, headers={"Content-Type": "application/json"},
            expect=JSON_ANSWERS,
        )  # fmt: skip
        return _loads(resp.content)

    def post_batched(
        self,
        path: str,
        body: Mapping[str, Any],
        *,
        table: str = "stars",
        progress: Progress | None = None,
        batch_size: int | None = None,
    ) -> dict:
        """POST a body whose ``table`` member is split into batches; join the answers.

        A batch refused for a limit that fewer stars cure (413 naming SKYDRIFT_MAX_STARS,
        SKYDRIFT_MAX_RESULTS or SKYDRIFT_MAX_BODY_BYTES) is sent again in smaller batches,
        and the rest of the call goes in batches of that size (:func:`_smaller_batch`).
        """
        stars = body[table]
        n = _count(stars)
        size = batch_size or self.batch_size
        several = n > size
        if several:  # several requests: one "now" for all (this machine's clock)
            body = pin_now(body, _now_text())
        parts, offsets = [], []
        start = 0
        while start < n or not parts:
            stop = min(n, start + size)
            part = dict(body)
            part[table] = _slice(stars, start, stop)
            try:
                parts.append(self.post(path, part))
            except SkydriftError as exc:
                smaller = _smaller_batch(exc, stop - start)
                if smaller is not None:
                    if not several:  # one request was to be sent; now several: one "now"
                        body, several = pin_now(body, _now_text()), True
                    size = smaller
                    continue
                exc.errors = [_shift_index(e, table, start) for e in exc.errors]
                raise
            offsets.append(start)
            if progress is not None:
                progress(stop - start)
            start = stop
        return merge_answers(parts, offsets)

    def _query_that_fits(self, path: str, params: Mapping[str, Any]) -> str:
        """The options as a query string (:func:`_query`); ValueError if the request line
        would be longer than the service reads (``max_request_line_bytes``)."""
        query = _query(params)
        limit = self.max_request_line_bytes
        if limit is None:
            return query
        url = requests.Request("POST", self.base_url + path, params=query).prepare().path_url
        line_bytes = len(f"POST {url} HTTP/1.1".encode())
        if line_bytes <= limit:
            return query
        lists = ", ".join(f"{len(v)} {k}" for k, v in params.items() if isinstance(v, list | tuple))
        raise ValueError(
            f"the options of a CSV or Arrow request travel in its query string, and these "
            f"({lists or 'as given'}) make a request line of {line_bytes} bytes; the service "
            f"reads at most {limit}: send fewer epochs per call, or send the stars as JSON "
            "(propagate, frames, observed), whose epochs travel in the body; evenly spaced "
            "target epochs also go as target_range"
        )

    def post_arrow(self, path: str, table, params: Mapping[str, Any] | None = None):
        """POST a star table as an Apache Arrow IPC stream; return the Arrow answer.

        Parameters
        ----------
        path : str
            A star-table endpoint, such as ``/v1/propagation``.
        table : pyarrow.Table or dict of columns
            The stars, one column per field (units in the names; null = unknown). A dict
            of columns (lists or numpy arrays) is made into a table by pyarrow.
        params : dict, optional
            The endpoint's other request fields, sent as query parameters.

        Returns
        -------
        pyarrow.Table
            One row per star and epoch (or event); the answer's other members (units, flag
            meanings, epochs, warnings) are JSON under the schema metadata key
            ``skydrift.answer`` (see :func:`arrow_answer_members`).

        Notes
        -----
        1. Sent in one request (no batching): Arrow is for bulk work, and the service's
           star limit (SKYDRIFT_MAX_STARS, default 1,000,000) applies. Needs pyarrow.
        2. ``params`` travel in the query string, lists comma-separated; ValueError before
           sending if they would make the request line longer than the service reads
           (``max_request_line_bytes``; about 810 epochs written like "J2026.123").
        """
        import pyarrow as pa

        if not isinstance(table, pa.Table):
            table = pa.table(table)
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table)
        query = self._query_that_fits(path, params or {})
        resp = self.request(
            "POST",
            path,
            params=query,
            data=sink.getvalue().to_pybytes(),
            headers={"Content-Type": ARROW_MIMETYPE, "Accept": ARROW_MIMETYPE},
            expect=(ARROW_MIMETYPE,),
        )
        with pa.ipc.open_stream(pa.py_buffer(resp.content)) as reader:
            return reader.read_all()

    def post_csv(
        self,
        path: str,
        csv_text: str,
        params: Mapping[str, Any] | None = None,
        *,
        progress: Progress | None = None,
        batch_size: int | None = None,
    ) -> str:
        """POST a CSV star table (options as query parameters); return the CSV answer.

        The table is sent in batches of ``batch_size`` rows (fewer after a 413 that fewer
        stars cure, as in :meth:`post_batched`); the answers are joined with the
        ``index`` column counted from the first star, and line numbers in errors refer to
        ``csv_text`` itself.
        """
        header, rows, lines = _read_csv(csv_text)
        size = batch_size or self.batch_size
        several = len(rows) > size
        if several:  # several requests: one "now" for all (this machine's clock)
            params = pin_now(params or {}, _now_text())
        query = self._query_that_fits(path, params or {})
        pieces: list[tuple[list[str], list[list[str]]]] = []
        start = 0
        while start < len(rows) or not pieces:
            chunk = rows[start : start + size]
            buf = io.StringIO()
            writer = csv.writer(buf, lineterminator="\n")
            writer.writerow(header)
            chunk_lines = [lines[0]]  # header
            writer.writerows(chunk)
            chunk_lines.extend(lines[1 + start : 1 + start + len(chunk)])
            try:
                resp = self.request(
                    "POST",
                    path,
                    params=query,
                    data=buf.getvalue().encode(),
                    headers={"Content-Type": "text/csv", "Accept": "text/csv"},
                    expect=("text/csv",),
                )
            except SkydriftError as exc:
                smaller = _smaller_batch(exc, len(chunk))
                if smaller is not None:
                    if not several:  # one request was to be sent; now several: one "now"
                        params, several = pin_now(params or {}, _now_text()), True
                        query = self._query_that_fits(path, params)
                    size = smaller
                    continue
                exc.errors = relocate_lines(exc.errors, buf.getvalue(), chunk_lines)
                raise
            out_header, out_rows, _ = _read_csv(resp.content.decode("utf-8-sig"))
            if "index" in out_header and start:
                k = out_header.index("index")
                for r in out_rows:
                    r[k] = str(int(r[k]) + start)
            pieces.append((out_header, out_rows))
            if progress is not None:
                progress(len(chunk))
            start += len(chunk)
        return _join_csv(pieces)

    # ------------------------------------------------------------ endpoints

    def health(self) -> dict:
        """GET /health: the process is alive."""
        return self.get("/health")

    def ready(self) -> dict:
        """GET /ready: tables loaded and settings valid (raises SkydriftError on 503)."""
        return self.get("/ready")

    def openapi(self) -> dict:
        """GET /openapi.json: the API description."""
        return self.get("/openapi.json")

    def propagate(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch,
        target_epochs: Iterable[Epoch] | None = None,
        target_range: tuple[Epoch, Epoch, int] | Mapping[str, Any] | None = None,
        model: str = "standard",
        layout: str | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> dict:
        """POST /v1/propagation: move stars to other epochs.

        Parameters
        ----------
        stars : list of dict or dict of columns
            ``ra_deg``, ``dec_deg`` (deg), ``pm_ra_cosdec_mas_yr``, ``pm_dec_mas_yr``
            (mas/yr), optional ``parallax_mas`` (mas), ``radial_velocity_km_s`` (km/s),
            standard errors and correlations, ``id``.
        catalogue_epoch : str or float
            Epoch of the given astrometry ("J2016.0"; a number is a Julian epoch, TDB).
        target_epochs : list of str or float, optional
            Epochs to move to. Give this or ``target_range``.
        target_range : (start, stop, count) or dict of those, optional
            Evenly spaced epochs, both ends included.
        model : {"standard", "light_time"}
        layout : {"records", "columns"}, optional
            Answer layout; default: the layout of ``stars``.
        progress : callable, optional
            Called with the number of stars done after each batch.
        """
        body = _targets(
            {"stars": stars, "catalogue_epoch": catalogue_epoch, "model": model},
            target_epochs,
            target_range,
        )
        if layout is not None:
            body["layout"] = layout
        _leave_unread(body, ignored_columns)
        return self.post_batched("/v1/propagation", body, progress=progress)

    def propagate_csv(
        self,
        csv_text: str,
        *,
        catalogue_epoch: Epoch,
        target_epochs: Iterable[Epoch] | None = None,
        target_range: tuple[Epoch, Epoch, int] | Mapping[str, Any] | None = None,
        model: str = "standard",
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> str:
        """POST /v1/propagation with a CSV table; the CSV answer (one row per star, epoch)."""
        params = _targets(
            {"catalogue_epoch": catalogue_epoch, "model": model}, target_epochs, target_range
        )
        params["ignored_columns"] = _names(ignored_columns)
        return self.post_csv("/v1/propagation", csv_text, params, progress=progress)

    def propagate_arrow(
        self,
        table,
        *,
        catalogue_epoch: Epoch,
        target_epochs: Iterable[Epoch] | None = None,
        target_range: tuple[Epoch, Epoch, int] | Mapping[str, Any] | None = None,
        model: str = "standard",
        ignored_columns: Iterable[str] = (),
    ):
        """POST /v1/propagation with an Arrow table (:meth:`post_arrow`); the Arrow answer."""
        params = _targets(
            {"catalogue_epoch": catalogue_epoch, "model": model}, target_epochs, target_range
        )
        params["ignored_columns"] = _names(ignored_columns)
        return self.post_arrow("/v1/propagation", table, params)

    def velocity(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch | None = None,
        relative_to_lsr: bool = False,
        solar_motion_km_s: tuple[float, float, float] | None = None,
        uncertainty_method: str = "linear",
        monte_carlo_draws: int | None = None,
        seed: int | None = None,
        low_snr_threshold: float | None = None,
        layout: str | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> dict:
        """POST /v1/velocity: transverse, radial, total velocity, U V W, closest approach.

        Parameters
        ----------
        stars : list of dict or dict of columns
            Astrometry (degrees, mas, mas/yr, km/s) with optional standard errors and
            correlations, or ``distance_pc`` in place of the parallax.
        catalogue_epoch : str or float, optional
            Dates the closest approach.
        relative_to_lsr : bool
            Also give U, V, W relative to the local standard of rest.
        solar_motion_km_s : (U, V, W), optional
            Sun's motion relative to the LSR, km/s (default: the service's); only with
            ``relative_to_lsr``.
        uncertainty_method : {"linear", "monte_carlo", "auto"}
        monte_carlo_draws, seed, low_snr_threshold : optional
            As in the API. With ``seed`` and several batches, each batch draws from the
            same seed, so answers depend on ``batch_size``.
        """
        body = self._velocity_options(
            catalogue_epoch,
            relative_to_lsr,
            solar_motion_km_s,
            uncertainty_method,
            monte_carlo_draws,
            seed,
            low_snr_threshold,
        )
        body["stars"] = stars
        if layout is not None:
            body["layout"] = layout
        _leave_unread(body, ignored_columns)
        return self.post_batched("/v1/velocity", body, progress=progress)

    def velocity_csv(
        self,
        csv_text: str,
        *,
        catalogue_epoch: Epoch | None = None,
        relative_to_lsr: bool = False,
        solar_motion_km_s: tuple[float, float, float] | None = None,
        uncertainty_method: str = "linear",
        monte_carlo_draws: int | None = None,
        seed: int | None = None,
        low_snr_threshold: float | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> str:
        """POST /v1/velocity with a CSV table; the CSV answer (one row per star)."""
        params = self._velocity_options(
            catalogue_epoch,
            relative_to_lsr,
            solar_motion_km_s,
            uncertainty_method,
            monte_carlo_draws,
            seed,
            low_snr_threshold,
        )
        params["ignored_columns"] = _names(ignored_columns)
        return self.post_csv("/v1/velocity", csv_text, params, progress=progress)

    @staticmethod
    def _velocity_options(
        catalogue_epoch,
        relative_to_lsr,
        solar_motion_km_s,
        uncertainty_method,
        monte_carlo_draws,
        seed,
        low_snr_threshold,
    ) -> dict:
        body: dict = {"relative_to_lsr": bool(relative_to_lsr)}
        body["uncertainty_method"] = uncertainty_method
        optional = {
            "catalogue_epoch": catalogue_epoch,
            "monte_carlo_draws": monte_carlo_draws,
            "seed": seed,
            "low_snr_threshold": low_snr_threshold,
        }
        body.update({k: v for k, v in optional.items() if v is not None})
        if solar_motion_km_s is not None:
            u, v, w = solar_motion_km_s
            body["solar_motion"] = {"u_km_s": u, "v_km_s": v, "w_km_s": w}
        return body

    def velocity_observables(
        self,
        stars: Stars,
        *,
        relative_to_lsr: bool = False,
        solar_motion_km_s: tuple[float, float, float] | None = None,
        layout: str | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> dict:
        """POST /v1/velocity/observables: proper motion and radial velocity from U V W.

        ``stars``: ``ra_deg``, ``dec_deg``, ``u_km_s``, ``v_km_s``, ``w_km_s`` and
        ``parallax_mas`` or ``distance_pc``.
        """
        body: dict = {"stars": stars, "relative_to_lsr": bool(relative_to_lsr)}
        if solar_motion_km_s is not None:
            u, v, w = solar_motion_km_s
            body["solar_motion"] = {"u_km_s": u, "v_km_s": v, "w_km_s": w}
        if layout is not None:
            body["layout"] = layout
        _leave_unread(body, ignored_columns)
        return self.post_batched("/v1/velocity/observables", body, progress=progress)

    def constellations(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch | None = None,
        epoch: Epoch | None = None,
        margins: bool = False,
        near_boundary_arcsec: float | None = None,
        reduction: str | None = None,
        frame: str | Mapping[str, Any] | None = None,
        layout: str | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> dict:
        """POST /v1/constellations/lookup (or /margins): the IAU constellation of each star.

        Parameters
        ----------
        stars : list of dict or dict of columns
            ``ra_deg``, ``dec_deg`` (ICRS, deg); with ``pm_ra_cosdec_mas_yr``,
            ``pm_dec_mas_yr`` (and optionally ``parallax_mas``, ``radial_velocity_km_s``)
            the stars are first moved from ``catalogue_epoch`` to ``epoch``.
        margins : bool
            Also the distance to the nearest boundary (arcsec) and the constellation across.
        near_boundary_arcsec : float, optional
            Margin under which a star is flagged near_boundary (only with ``margins``:
            the lookup measures no distance to a boundary; ValueError otherwise).
        reduction : {"fk4", "fk5", "fk5_iau1976"}, optional
            Reduction to the boundaries' equinox B1875.0 (service default: fk4).
        frame : str or dict, optional
            Frame of the stars' astrometry, as for :meth:`observed` (``"fk4"``, or
            ``{"name": "fk5", "equinox": "J1975.0"}``); default ICRS.
        """
        _margins_option(margins, near_boundary_arcsec)
        body = self._constellation_options(catalogue_epoch, epoch, near_boundary_arcsec, reduction)
        if frame is not None:
            body["frame"] = _frame(frame)
        body["stars"] = stars
        if layout is not None:
            body["layout"] = layout
        path = "/v1/constellations/margins" if margins else "/v1/constellations/lookup"
        _leave_unread(body, ignored_columns)
        return self.post_batched(path, body, progress=progress)

    def constellations_csv(
        self,
        csv_text: str,
        *,
        catalogue_epoch: Epoch | None = None,
        epoch: Epoch | None = None,
        margins: bool = False,
        near_boundary_arcsec: float | None = None,
        reduction: str | None = None,
        frame: str | Mapping[str, Any] | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> str:
        """The constellations of a CSV table of stars, as CSV (one row per star); the
        options as for :meth:`constellations`."""
        _margins_option(margins, near_boundary_arcsec)
        params = self._constellation_options(
            catalogue_epoch, epoch, near_boundary_arcsec, reduction
        )
        if frame is not None:
            params["frame"] = {k: v for k, v in _frame(frame).items() if v is not None}
        path = "/v1/constellations/margins" if margins else "/v1/constellations/lookup"
        params["ignored_columns"] = _names(ignored_columns)
        return self.post_csv(path, csv_text, params, progress=progress)

    @staticmethod
    def _constellation_options(catalogue_epoch, epoch, near_boundary_arcsec, reduction) -> dict:
        options = {
            "catalogue_epoch": catalogue_epoch,
            "epoch": epoch,
            "near_boundary_arcsec": near_boundary_arcsec,
            "reduction": reduction,
        }
        return {k: v for k, v in options.items() if v is not None}

    def constellation_crossings(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch,
        start: Epoch,
        end: Epoch,
        max_step_yr: float | None = None,
        reduction: str | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> dict:
        """POST /v1/constellations/crossings: every boundary crossing in a time window.

        The search costs far more per star than the other endpoints, so stars are sent in
        batches of at most ``CROSSING_BATCH_SIZE``.
        """
        body = {"catalogue_epoch": catalogue_epoch, "start": start, "end": end}
        body.update(
            {
                k: v
                for k, v in (("max_step_yr", max_step_yr), ("reduction", reduction))
                if v is not None
            }
        )
        body["stars"] = stars
        _leave_unread(body, ignored_columns)
        return self.post_batched(
            "/v1/constellations/crossings",
            body,
            progress=progress,
            batch_size=min(self.batch_size, CROSSING_BATCH_SIZE),
        )

    def constellation_crossings_csv(
        self,
        csv_text: str,
        *,
        catalogue_epoch: Epoch,
        start: Epoch,
        end: Epoch,
        max_step_yr: float | None = None,
        reduction: str | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> str:
        """Boundary crossings of a CSV table of stars, as CSV (one row per crossing)."""
        params = {"catalogue_epoch": catalogue_epoch, "start": start, "end": end}
        params.update({"max_step_yr": max_step_yr, "reduction": reduction})
        params["ignored_columns"] = _names(ignored_columns)
        return self.post_csv(
            "/v1/constellations/crossings",
            csv_text,
            params,
            progress=progress,
            batch_size=min(self.batch_size, CROSSING_BATCH_SIZE),
        )

    def site_list(self) -> dict:
        """GET /v1/sites: the named sites, their coordinates and the limits requests get."""
        return self.get("/v1/sites")

    def constellation_list(self) -> dict:
        """GET /v1/constellations: the 88 IAU constellations, names and areas."""
        return self.get("/v1/constellations")

    def constellation_outline(
        self,
        abbreviation: str,
        *,
        frame: str | None = None,
        equinox: Epoch | None = None,
        reduction: str | None = None,
        tolerance_arcsec: float | None = None,
    ) -> dict:
        """GET /v1/constellations/<abbreviation>/outline: the outline as a GeoJSON Feature."""
        params = _outline_params(frame, equinox, reduction, tolerance_arcsec)
        return self.get(f"/v1/constellations/{abbreviation}/outline", **params)

    def constellation_outlines(
        self,
        *,
        frame: str | None = None,
        equinox: Epoch | None = None,
        reduction: str | None = None,
        tolerance_arcsec: float | None = None,
    ) -> dict:
        """GET /v1/constellations/outlines: all 88 outlines, a GeoJSON FeatureCollection."""
        params = _outline_params(frame, equinox, reduction, tolerance_arcsec)
        return self.get("/v1/constellations/outlines", **params)

    def frames(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch,
        from_frame: str | Mapping[str, Any],
        to_frame: str | Mapping[str, Any] = "icrs",
        target_epochs: Iterable[Epoch] | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> dict:
        """POST /v1/frames: position, motion, parallax, radial velocity in another frame.

        Frames are a name ("icrs", "fk5", "fk4", "galactic", "ecliptic") or an object
        ``{"name": "fk4", "equinox": "B1950.0"}``. With ``target_epochs`` the stars are also
        moved (straight-line model) to those epochs.
        """
        body = {"stars": stars, **_frames_options(catalogue_epoch, from_frame, to_frame)}
        _leave_unread(body, ignored_columns)
        return self.post_batched("/v1/frames", _with_epochs(body, target_epochs), progress=progress)

    def frames_csv(
        self,
        csv_text: str,
        *,
        catalogue_epoch: Epoch,
        from_frame: str | Mapping[str, Any],
        to_frame: str | Mapping[str, Any] = "icrs",
        target_epochs: Iterable[Epoch] | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
    ) -> str:
        """A CSV table of stars in another frame, as CSV (one row per star and epoch);
        frames and ``target_epochs`` as for :meth:`frames`."""
        params = _frames_options(catalogue_epoch, from_frame, to_frame)
        for key in ("from_frame", "to_frame"):  # as query options: members given only
            params[key] = {k: v for k, v in params[key].items() if v is not None}
        params = _with_epochs(params, target_epochs)
        params["ignored_columns"] = _names(ignored_columns)
        return self.post_csv("/v1/frames", csv_text, params, progress=progress)

    def observed(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch,
        instants: Iterable[Epoch] | Epoch | None = None,
        site: str | Mapping[str, float],
        frame: str | Mapping[str, Any] | None = None,
        atmosphere: Mapping[str, float | None] | None = None,
        horizon_limit_deg: float | None = None,
        sun_avoidance_deg: float | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
        include_rates: bool = False,
        instant_range: tuple[Epoch, Epoch, int] | Mapping[str, Any] | None = None,
    ) -> dict:
        """POST /v1/observed: observed places at a site, with advisory Sun/horizon figures.

        Parameters
        ----------
        stars : list of dict or dict of columns
            Astrometry at ``catalogue_epoch`` (in ``frame``, default ICRS).
        instants : epoch or list of epochs, optional
            Instants of observation (ISO 8601 UTC or any epoch form). Give this or
            ``instant_range``.
        instant_range : (start, stop, count) or dict of those, optional
            ``count`` instants from ``start`` to ``stop``, both included, in equal steps of
            elapsed time (a track for the night).
        site : str or dict
            A configured site name (the demo's "kestrel-ridge") or ``{"latitude_deg",
            "longitude_deg", "height_m"}``.
        atmosphere : dict, optional
            ``pressure_hpa``, ``temperature_c``, ``relative_humidity``, ``wavelength_um``.
        horizon_limit_deg, sun_avoidance_deg : float, optional
            Limits for the advisory flags, degrees. The figures are advisory: the facility's
            own interlocks and safety rules decide where a telescope may point.
        include_rates : bool
            Also give how fast each place's azimuth, altitude, parallactic angle, observed
            hour angle and declination change (arcsec per second of time), for tracking.
        """
        body: dict = {"stars": stars, "catalogue_epoch": catalogue_epoch}
        _list_or_range(body, "instants", instants, "instant_range", instant_range)
        body["site"] = site
        optional = {
            "frame": None if frame is None else _frame(frame),
            "atmosphere": atmosphere,
            "horizon_limit_deg": horizon_limit_deg,
            "sun_avoidance_deg": sun_avoidance_deg,
            "include_rates": True if include_rates else None,
        }
        body.update({k: v for k, v in optional.items() if v is not None})
        _leave_unread(body, ignored_columns)
        return self.post_batched("/v1/observed", body, progress=progress)

    def observed_csv(
        self,
        csv_text: str,
        *,
        catalogue_epoch: Epoch,
        instants: Iterable[Epoch] | Epoch | None = None,
        site: str | Mapping[str, float],
        frame: str | Mapping[str, Any] | None = None,
        atmosphere: Mapping[str, float | None] | None = None,
        horizon_limit_deg: float | None = None,
        sun_avoidance_deg: float | None = None,
        progress: Progress | None = None,
        ignored_columns: Iterable[str] = (),
        include_rates: bool = False,
        instant_range: tuple[Epoch, Epoch, int] | Mapping[str, Any] | None = None,
    ) -> str:
        """Observed places of a CSV table of stars, as CSV (one row per star and instant).

        ``site`` is a configured name or ``{"latitude_deg", "longitude_deg", "height_m"}``;
        ``instants`` or ``instant_range``, ``frame``, ``atmosphere`` and ``include_rates``
        as for :meth:`observed` (default ICRS, the service's atmosphere, no rates). The Sun
        and horizon figures and flags are advisory.
        """
        params: dict = _list_or_range(
            {"catalogue_epoch": catalogue_epoch}, "instants", instants, "instant_range",
            instant_range,
        )  # fmt: skip
        params["site"] = site if isinstance(site, str) else json.dumps(dict(site))
        if frame is not None:
            params["frame"] = {k: v for k, v in _frame(frame).items() if v is not None}
        if atmosphere:
            params["atmosphere"] = {k: v for k, v in atmosphere.items() if v is not None}
        params.update(
            {"horizon_limit_deg": horizon_limit_deg, "sun_avoidance_deg": sun_avoidance_deg}
        )
        params["ignored_columns"] = _names(ignored_columns)
        if include_rates:
            params["include_rates"] = True
        return self.post_csv("/v1/observed", csv_text, params, progress=progress)

    def chart_track(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch,
        start: Epoch,
        stop: Epoch,
        ticks: int = 6,
        image_format: str = "svg",
        boundaries: bool = True,
        title: str | None = None,
        width_px: int | None = None,
    ) -> bytes:
        """POST /v1/charts/track: the tracks of a few stars across the sky, as SVG or PNG
        (``width_px``: the image's width in pixels)."""
        body = {
            "stars": stars,
            "catalogue_epoch": catalogue_epoch,
            "start": start,
            "stop": stop,
            "ticks": ticks,
            "format": image_format,
            "boundaries": boundaries,
        }
        if title is not None:
            body["title"] = title
        if width_px is not None:
            body["width_px"] = width_px
        return self._image("/v1/charts/track", body)

    def chart_field(
        self,
        stars: Stars,
        *,
        catalogue_epoch: Epoch,
        epochs: tuple[Epoch, Epoch],
        arrow_years: float | None = None,
        image_format: str = "svg",
        title: str | None = None,
        width_px: int | None = None,
    ) -> bytes:
        """POST /v1/charts/field: a star field at two epochs side by side, motion arrows
        (``width_px``: the image's width in pixels)."""
        body = {
            "stars": stars,
            "catalogue_epoch": catalogue_epoch,
            "epochs": list(epochs),
            "format": image_format,
        }
        if arrow_years is not None:
            body["arrow_years"] = arrow_years
        if title is not None:
            body["title"] = title
        if width_px is not None:
            body["width_px"] = width_px
        return self._image("/v1/charts/field", body)

    def _image(self, path: str, body: dict) -> bytes:
        data = _dumps(body)
        resp = self.request(
            "POST", path, data=data, headers={"Content-Type": "application/json"},
            expect=("image/",),
        )  # fmt: skip
        return resp.content


def _frame(frame) -> dict:
    return {"name": frame} if isinstance(frame, str) else dict(frame)


def _frames_options(catalogue_epoch, from_frame, to_frame) -> dict:
    """The options of a frames request (:meth:`Client.frames`, :meth:`Client.frames_csv`)."""
    return {
        "catalogue_epoch": catalogue_epoch,
        "from_frame": _frame(from_frame),
        "to_frame": _frame(to_frame),
    }


def _with_epochs(options: dict, target_epochs) -> dict:
    """``options`` with ``target_epochs`` (one epoch or several) as a list, if given."""
    if target_epochs is None:
        return options
    epochs = [target_epochs] if isinstance(target_epochs, str | float | int) else target_epochs
    return {**options, "target_epochs": list(epochs)}


def _outline_params(frame, equinox, reduction, tolerance_arcsec) -> dict:
    params = {
        "frame": frame,
        "equinox": equinox,
        "reduction": reduction,
        "tolerance_arcsec": tolerance_arcsec,
    }
    return {k: v for k, v in params.items() if v is not None}


def _targets(body: dict, target_epochs, target_range) -> dict:
    return _list_or_range(body, "target_epochs", target_epochs, "target_range", target_range)


def _list_or_range(body: dict, list_key: str, listed, range_key: str, rng) -> dict:
    """``body`` with exactly one of the list of epochs (or instants) ``listed`` under
    ``list_key`` and the range ``rng`` ((start, stop, count) or a dict of those) under
    ``range_key``."""
    if (listed is None) == (rng is None):
        raise ValueError(f"give exactly one of {list_key} or {range_key}")
    if listed is not None:
        body[list_key] = [listed] if isinstance(listed, str | float | int) else list(listed)
    else:
        if isinstance(rng, Mapping):  # the API's own form
            extra = set(rng) - {"start", "stop", "count"}
            if extra or len(rng) != 3:
                raise ValueError(
                    f"{range_key}: give start, stop and count (as (start, stop, count) or "
                    f"a dict of those three), not {sorted(rng)}"
                )
            rng = (rng["start"], rng["stop"], rng["count"])
        start, stop, count = rng
        body[range_key] = {"start": start, "stop": stop, "count": _whole(count)}
    return body


#: Media type of Apache Arrow IPC streams.
ARROW_MIMETYPE = "application/vnd.apache.arrow.stream"

#: Schema metadata key of an Arrow answer holding its other members as JSON (the service's
#: arrowio.ANSWER_METADATA_KEY; repeated here so that this module needs only requests).
ARROW_ANSWER_KEY = b"skydrift.answer"


def arrow_answer_members(table) -> dict:
    """The answer's members other than the table (units, flag meanings, epochs, warnings)
    from an Arrow answer's schema metadata."""
    meta = table.schema.metadata or {}
    return json.loads(meta.get(ARROW_ANSWER_KEY, b"{}"))


#: Request fields whose values are epochs (or lists of them), and the objects that hold
#: such fields (a range, a frame with its equinox): where "now" may appear.
_EPOCH_KEYS = frozenset(
    {"catalogue_epoch", "target_epochs", "instants", "epochs", "epoch", "start", "stop", "end",
     "equinox"}
)  # fmt: skip
_EPOCH_HOLDERS = frozenset({"target_range", "instant_range", "frame", "from_frame", "to_frame"})


def _is_now(value) -> bool:
    return isinstance(value, str) and value.strip().lower() == "now"


def pin_now(fields: Mapping[str, Any], now: str) -> dict:
    """The request fields with every epoch given as "now" replaced by ``now`` (ISO UTC
    text): a call sent as several requests must mean one instant by "now", not one per
    request (each request's "now" is its own clock reading)."""
    out = {}
    for key, value in fields.items():
        if key in _EPOCH_KEYS:
            if _is_now(value):
                value = now
            elif isinstance(value, list | tuple):
                value = [now if _is_now(v) else v for v in value]
        elif key in _EPOCH_HOLDERS and isinstance(value, Mapping):
            value = pin_now(value, now)
        out[key] = value
    return out


def _now_text() -> str:
    """This machine's clock, UTC, as ISO 8601 text to the microsecond."""
    import datetime as dt

    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _leave_unread(body: dict, ignored_columns: str | Iterable[str]) -> None:
    """The request's ``ignored_columns`` in a JSON body, where any are given."""
    names = _names(ignored_columns)
    if names:
        body["ignored_columns"] = names


def _names(names: str | Iterable[str]) -> list[str]:
    """Column names to leave unread as a list (one name given as a string is one name, not
    its letters)."""
    return [names] if isinstance(names, str) else list(names)


def _query(params: Mapping[str, Any]) -> str:
    """Request options as a query string: lists comma-separated, objects with dotted names.

    The service reads a list given once comma-separated as it reads the key repeated (no
    epoch it accepts holds a comma). Comma-separated, with commas and colons left as they
    are (RFC 3986 allows both in a query), a list of epochs takes less than half the bytes
    of the key repeated per epoch: the request line is limited
    (:data:`MAX_REQUEST_LINE_BYTES`).
    """
    out: list[tuple[str, str]] = []
    for key, value in params.items():
        if value is None:
            continue
        if isinstance(value, Mapping):
            out.extend((f"{key}.{k}", "" if v is None else str(v)) for k, v in value.items())
        elif isinstance(value, list | tuple):
            if value:  # an empty list: the option not given, as before
                out.append((key, ",".join(str(v) for v in value)))
        elif isinstance(value, bool):
            out.append((key, "true" if value else "false"))
        else:
            out.append((key, str(value)))
    return urllib.parse.urlencode(out, safe=",:")


def _read_csv(text: str) -> tuple[list[str], list[list[str]], list[int]]:
    """CSV text -> (header, data rows, line numbers of [header, rows...]); blank lines out."""
    reader = csv.reader(io.StringIO(text, newline=""))
    header: list[str] | None = None
    rows: list[list[str]] = []
    lines: list[int] = []
    last = 0
    for row in reader:
        start, last = last + 1, reader.line_num
        if not row or (len(row) == 1 and not row[0].strip()):
            continue
        if header is None:
            header = row
        else:
            rows.append(row)
        lines.append(start)
    if header is None:
        raise ValueError("the CSV text has no header row")
    return header, rows, lines


def _shift_index(error: FieldError, table: str, offset: int) -> FieldError:
    """'stars[3].dec_deg' or 'stars.dec_deg[3]' in a batch -> the index in the whole input."""
    if not offset:
        return error
    pattern = re.compile(rf"^({re.escape(table)}(?:\.[A-Za-z0-9_*]+)?)\[(\d+)\]")
    m = pattern.match(error.field)
    if not m:
        return error
    field = f"{m.group(1)}[{int(m.group(2)) + offset}]" + error.field[m.end() :]
    return FieldError(field, error.message)


def relocate_lines(errors: list[FieldError], sent: str, lines: list[int]) -> list[FieldError]:
    """'line 3: dec_deg' in CSV text sent in place of the caller's -> the same row's line in
    the caller's text.

    ``sent`` holds rows of the caller's text (some left out, blank lines dropped, cells
    rewritten); ``lines`` is the caller's line of its header and of each row, in order. The
    service names a row by the line it starts on, and a quoted cell may span lines, so the
    rows of ``sent`` are found by reading it (only when there is an error to place).
    """
    if not any(_LINE.match(e.field) for e in errors):
        return errors
    where = dict(zip(_read_csv(sent)[2], lines, strict=False))
    out = []
    for e in errors:
        m = _LINE.match(e.field)
        line = where.get(int(m.group(1))) if m else None
        out.append(e if line is None else FieldError(f"line {line}{m.group(2)}", e.message))
    return out


def _join_csv(pieces: list[tuple[list[str], list[list[str]]]]) -> str:
    """Join CSV answers whose headers may differ (a column only some batches have)."""
    header: list[str] = list(pieces[0][0])
    for h, _ in pieces[1:]:
        for pos, name in enumerate(h):
            if name not in header:
                before = h[pos - 1] if pos else None
                at = header.index(before) + 1 if before in header else len(header)
                header.insert(at, name)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\r\n")
    writer.writerow(header)
    for h, rows in pieces:
        if h == header:
            writer.writerows(rows)
            continue
        where = [h.index(name) if name in h else None for name in header]
        writer.writerows([[r[k] if k is not None else "" for k in where] for r in rows])
    return buf.getvalue()


def _margins_option(margins: bool, near_boundary_arcsec: float | None) -> None:
    """near_boundary_arcsec belongs to the margins endpoint (the service refuses it on the
    lookup, which measures no distance to a boundary): say so before sending anything."""
    if near_boundary_arcsec is not None and not margins:
        raise ValueError(
            "near_boundary_arcsec is an option of the margins (margins=True; on the command "
            "line --margins): the lookup measures no distance to a boundary"
        )
