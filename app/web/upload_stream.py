"""Stream a multipart upload to disk: hashed on the way, size limit enforced per chunk.

Each file part goes through a :class:`app.store.files.HashingWriter` into the
data folder's ``tmp/``. The size limit counts file and field bytes as they arrive and
stops the request at the first chunk past it; every partial file of the
request is then removed. Only when the whole request has arrived are the
files moved to their content addresses.
"""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass, field

from python_multipart.multipart import MultipartParser, parse_options_header
from starlette.concurrency import run_in_threadpool

from app.config import Settings
from app.store.errors import ValidationError
from app.store.files import HashingWriter, StoredBlob, UploadTooLargeError

MAX_FIELD_BYTES = 64 * 1024
#: form-field bytes allowed beyond the upload limit (the same room the body cap of
#: app.web.limits gives)
FIELDS_ALLOWANCE = 1024**2
MAX_FIELDS = 60_000
DRAIN_LIMIT = 64 * 1024**2


@dataclass
class ParsedUpload:
    fields: dict[str, list[str]] = field(default_factory=dict)
    files: list[tuple[str, StoredBlob]] = field(default_factory=list)

    def first(self, name: str) -> str:
        values = self.fields.get(name) or [""]
        return values[0]


class UploadStream:
    """Parse one ``multipart/form-data`` body into fields and stored files.

    Parameters
    ----------
    settings : Settings
    content_type : str
        The request's Content-Type header (carries the boundary).
    max_bytes : int
        Upper bound on the sum of file sizes in this request; files and form
        fields together may use :data:`FIELDS_ALLOWANCE` more.
    before_first_file : callable, optional
        Called with the fields seen so far when the first file part starts
        (the CSRF check: a form must put its token before its files).
    """

    def __init__(self, settings: Settings, content_type: str, *, max_bytes: int,
                 before_first_file: Callable[[dict[str, list[str]]], None] | None = None) -> None:
        ctype, params = parse_options_header(content_type)
        boundary = params.get(b"boundary")
        if ctype != b"multipart/form-data" or not boundary:
            raise ValidationError("The upload must be sent as multipart/form-data.")
        self.settings = settings
        self.max_bytes = max_bytes
        self.before_first_file = before_first_file
        self.result = ParsedUpload()
        self._writers: list[tuple[str, HashingWriter]] = []
        self._total = 0
        self._field_bytes = 0
        self._n_fields = 0
        self._header_field = b""
        self._headers: dict[bytes, bytes] = {}
        self._part_name = ""
        self._part_filename: str | None = None
        self._field_buf = bytearray()
        self._writer: HashingWriter | None = None
        self._seen_file = False
        self._parser = MultipartParser(boundary, {
            "on_part_begin": self._on_part_begin,
            "on_header_field": self._on_header_field,
            "on_header_value": self._on_header_value,
            "on_header_end": self._on_header_end,
            "on_headers_finished": self._on_headers_finished,
            "on_part_data": self._on_part_data,
            "on_part_end": self._on_part_end,
        })

    # -- parser callbacks
    def _on_part_begin(self) -> None:
        self._headers = {}
        self._header_field = b""
        self._field_buf = bytearray()
        self._writer = None
        self._part_filename = None
        self._n_fields += 1
        if self._n_fields > MAX_FIELDS:
            raise ValidationError("The upload has too many parts.")

    def _on_header_field(self, data: bytes, start: int, end: int) -> None:
        self._header_field += data[start:end]

    def _on_header_value(self, data: bytes, start: int, end: int) -> None:
        key = self._header_field.lower()
        self._headers[key] = self._headers.get(key, b"") + data[start:end]

    def _on_header_end(self) -> None:
        self._header_field = b""

    def _on_headers_finished(self) -> None:
        _, opts = parse_options_header(self._headers.get(b"content-disposition", b""))
        self._part_name = opts.get(b"name", b"").decode("utf-8", "replace")
        filename = opts.get(b"filename")
        if filename is None:
            return
        self._part_filename = filename.decode("utf-8", "replace")
        if not self._seen_file:
            self._seen_file = True
            if self.before_first_file is not None:
                self.before_first_file(self.result.fields)
        self._writer = HashingWriter(self.settings, budget=self._budget)

    def _budget(self, n: int) -> None:
        self._total += n
        if self._total > self.max_bytes:
            raise UploadTooLargeError(
                f"The upload is larger than the limit of {self.max_bytes} bytes; "
                "nothing was stored.")

    def _on_part_data(self, data: bytes, start: int, end: int) -> None:
        if self._writer is not None:
            self._writer.write(data[start:end])
            return
        self._field_bytes += end - start
        # fields count against the upload limit too, beyond a small allowance for the form
        if self._field_bytes > FIELDS_ALLOWANCE and \
                self._total + self._field_bytes > self.max_bytes + FIELDS_ALLOWANCE:
            raise UploadTooLargeError(
                f"The upload's form fields and files are larger than the limit of "
                f"{self.max_bytes} bytes; nothing was stored.")
        self._field_buf += data[start:end]
        if len(self._field_buf) > MAX_FIELD_BYTES:
            raise ValidationError(f"The form field {self._part_name!r} is too long.")

    def _on_part_end(self) -> None:
        if self._writer is not None:
            writer, self._writer = self._writer, None
            if not self._part_filename and writer.size == 0:
                writer.abort()  # an empty file input
                return
            self._writers.append((self._part_filename or "file", writer))
            return
        value = self._field_buf.decode("utf-8", "replace")
        self.result.fields.setdefault(self._part_name, []).append(value)

    # -- driving
    async def consume(self, stream: AsyncIterator[bytes]) -> ParsedUpload:
        """Read the whole body; on any error remove every partial file and re-raise.

        After a size-limit error the rest of the body (up to 64 MiB) is read
        and discarded, so that the client receives the answer.
        """
        try:
            async for chunk in stream:
                self._parser.write(chunk)
            self._parser.finalize()
            if self._writer is not None:
                raise ValidationError("The upload ended in the middle of a file.")
        except BaseException as exc:
            self.abort()
            if isinstance(exc, UploadTooLargeError):
                await _drain(stream)
            raise
        names = self.result.fields.get("relpath", [])
        try:
            for i, (filename, writer) in enumerate(self._writers):
                rel = names[i] if i < len(names) and names[i].strip() else filename
                # fsync and rename off the event loop
                self.result.files.append((rel, await run_in_threadpool(writer.commit)))
        except BaseException:
            self.abort()  # removes what was not committed yet
            raise
        return self.result

    def abort(self) -> None:
        if self._writer is not None:
            self._writer.abort()
            self._writer = None
        for _, writer in self._writers:
            writer.abort()
        self._writers.clear()


async def _drain(stream: AsyncIterator[bytes]) -> None:
    drained = 0
    try:
        async for chunk in stream:
            drained += len(chunk)
            if drained > DRAIN_LIMIT:
                break
    except Exception:  # noqa: BLE001 - the client may already have gone
        return
