"""A read-only S3 endpoint on the loopback interface (127.0.0.1 only), serving a local folder
as one bucket: HeadBucket, HeadObject, ranged GetObject and ListObjectsV2 (prefix and
delimiter; small listings, no continuation). Or, with ``status``, an endpoint that answers
every request with that HTTP status (e.g. 403: credentials refused).

It lets the tests drive pyarrow's own S3 client through metricforge's s3a:// code path
without any network beyond the loopback interface."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager
from email.utils import formatdate
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from urllib.parse import parse_qs, unquote, urlsplit
from xml.sax.saxutils import escape


def _handler(bucket: str, root: Path, status: int | None) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        protocol_version = "HTTP/1.1"

        def log_message(self, format: str, *args: object) -> None:  # noqa: A002
            pass

        def _send(
            self, code: int, body: bytes = b"", headers: dict[str, str] | None = None
        ) -> None:
            self.send_response(code)
            for k, v in (headers or {}).items():
                self.send_header(k, v)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            if self.command != "HEAD":
                self.wfile.write(body)

        def _target(self) -> tuple[str, str, dict[str, list[str]]]:
            parts = urlsplit(self.path)
            name, _, key = unquote(parts.path).lstrip("/").partition("/")
            return name, key, parse_qs(parts.query)

        def _file(self, key: str) -> Path | None:
            path = root / key
            return path if key and path.is_file() else None

        def do_HEAD(self) -> None:  # noqa: N802
            self._answer()

        def do_GET(self) -> None:  # noqa: N802
            self._answer()

        def _answer(self) -> None:
            if status is not None:
                self._send(status, b"<Error><Code>AccessDenied</Code></Error>")
                return
            name, key, query = self._target()
            if name != bucket:
                self._send(404, b"<Error><Code>NoSuchBucket</Code></Error>")
            elif not key and "list-type" in query:
                self._list(query)
            elif not key:
                self._send(200)
            elif (path := self._file(key)) is None:
                self._send(404, b"<Error><Code>NoSuchKey</Code></Error>")
            else:
                self._object(path)

        def _object(self, path: Path) -> None:
            data = path.read_bytes()
            headers = {"Last-Modified": formatdate(usegmt=True), "ETag": '"0"'}
            wanted = self.headers.get("Range")
            if wanted and self.command == "GET":
                first, _, last = wanted.removeprefix("bytes=").partition("-")
                lo, hi = int(first), min(int(last) if last else len(data) - 1, len(data) - 1)
                headers["Content-Range"] = f"bytes {lo}-{hi}/{len(data)}"
                self._send(206, data[lo : hi + 1], headers)
            else:
                self._send(200, data, headers)

        def _list(self, query: dict[str, list[str]]) -> None:
            prefix = query.get("prefix", [""])[0]
            delimiter = query.get("delimiter", [""])[0]
            keys = sorted(p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file())
            contents, prefixes = [], []
            for key in keys:
                if not key.startswith(prefix):
                    continue
                rest = key[len(prefix) :]
                if delimiter and delimiter in rest:
                    common = prefix + rest[: rest.index(delimiter) + 1]
                    if common not in prefixes:
                        prefixes.append(common)
                else:
                    size = (root / key).stat().st_size
                    contents.append(
                        f"<Contents><Key>{escape(key)}</Key>"
                        "<LastModified>2026-01-01T00:00:00.000Z</LastModified>"
                        f'<ETag>"0"</ETag><Size>{size}</Size>'
                        "<StorageClass>STANDARD</StorageClass></Contents>"
                    )
            body = (
                '<?xml version="1.0" encoding="UTF-8"?>'
                '<ListBucketResult xmlns="http://s3.amazonaws.com/doc/2006-03-01/">'
                f"<Name>{bucket}</Name><Prefix>{escape(prefix)}</Prefix>"
                f"<KeyCount>{len(contents) + len(prefixes)}</KeyCount><MaxKeys>1000</MaxKeys>"
                "<IsTruncated>false</IsTruncated>"
                + "".join(contents)
                + "".join(
                    f"<CommonPrefixes><Prefix>{escape(p)}</Prefix></CommonPrefixes>"
                    for p in prefixes
                )
                + "</ListBucketResult>"
            ).encode()
            self._send(200, body, {"Content-Type": "application/xml"})

    return Handler


@contextmanager
def fake_s3(bucket: str, root: Path, status: int | None = None) -> Iterator[str]:
    """Serve ``root`` as ``bucket`` on a free loopback port; yields the endpoint URL."""
    server = ThreadingHTTPServer(("127.0.0.1", 0), _handler(bucket, root, status))
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}"
    finally:
        server.shutdown()
        server.server_close()
        thread.join()
