"""Data locations given as URIs: ``s3a://``, ``gs://``, ``abfss://``, ``hdfs://``, ``file://``.

A spec's ``[data] events`` and ``exposures`` may name a URI instead of a local path. This
module checks such a URI when the spec is loaded (a known scheme, its expected form, no
``.``/``..`` segments, no query, credentials, percent-escapes or glob characters), opens the
file system it names with pyarrow when a run lists its files, and lists the Parquet files
under it. Settings and credentials never come from the spec: they come from the
environment (the usual variables of each service) or from the Hadoop keys of the Spark conf
(``--spark-conf spark.hadoop.fs.s3a.endpoint=...``); connection attempts are bounded.

Every listed file is a ``Uri`` with two forms: ``text``, the URI as the spec wrote it
followed by the file's path below it (the file's label: the same on every machine), and
``spark``, the URI the Spark engine reads (``s3://`` and ``s3n://`` become ``s3a://``).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from metricforge.errors import closest

# Scheme as written -> (pyarrow's scheme, the scheme Spark reads).
SCHEMES: Mapping[str, tuple[str, str]] = {
    "s3a": ("s3", "s3a"),
    "s3": ("s3", "s3a"),
    "s3n": ("s3", "s3a"),
    "gs": ("gs", "gs"),
    "abfss": ("abfss", "abfss"),
    "abfs": ("abfs", "abfs"),
    "hdfs": ("hdfs", "hdfs"),
    "file": ("file", "file"),
}
CONNECT_TIMEOUT_S = 5.0  # one connection attempt to an object store
S3_ATTEMPTS = 2  # one retry of a failed S3 request
GCS_RETRY_S = 15  # GCS retries transient errors for at most this long
# Two or more letters then a colon: a URI (one letter would be a Windows drive).
_URI = re.compile(r"([A-Za-z][A-Za-z0-9+.-]+):")
# Spark expands these in a path it is given (glob patterns); a URI naming data exactly must
# not hold them. '%' is refused too: an escape would name another object than it shows.
_NOT_ALLOWED = "*?[]{}\\%#"
# Where each service's credentials come from (for error messages).
CREDENTIALS: Mapping[str, str] = {
    "s3": "AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, AWS_PROFILE, an instance role, or"
    " --spark-conf spark.hadoop.fs.s3a.access.key/secret.key",
    "gs": "GOOGLE_APPLICATION_CREDENTIALS or the machine's service account",
    "abfs": "AZURE_CLIENT_ID/AZURE_TENANT_ID/AZURE_CLIENT_SECRET or a managed identity",
    "abfss": "AZURE_CLIENT_ID/AZURE_TENANT_ID/AZURE_CLIENT_SECRET or a managed identity",
    "hdfs": "a Kerberos ticket (kinit) where the cluster needs one",
    "file": "the file permissions",
}
_LIBRARIES: Mapping[str, str] = {
    "hdfs": "HDFS needs libhdfs and a Java runtime: set JAVA_HOME, ARROW_LIBHDFS_DIR or"
    " HADOOP_HOME, and CLASSPATH=$(hadoop classpath --glob)",
}


class UriError(ValueError):
    """A data location that is not an accepted URI (raised while the spec is loaded)."""

    def __init__(self, message: str, suggestion: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.suggestion = suggestion


class StorageError(Exception):
    """A file system that cannot be opened or listed; ``absent`` when the location simply
    holds no data (not found, or no Parquet file under it)."""

    def __init__(self, message: str, *, absent: bool = False) -> None:
        super().__init__(message)
        self.message = message
        self.absent = absent


@dataclass(frozen=True)
class Uri:
    """A data location or file named by a URI; ``fs`` is its open pyarrow file system."""

    text: str  # as the spec wrote it (a file: the location's text + "/" + its path below)
    scheme: str  # lower case, one of SCHEMES
    netloc: str  # bucket, container@account host, namenode:port; "" for file
    path: str  # "/logs/events"; "" for a whole bucket
    fs: Any = field(default=None, compare=False, hash=False, repr=False)

    def __str__(self) -> str:
        return self.text

    @property
    def remote(self) -> bool:
        return self.scheme != "file"

    @property
    def spark(self) -> str:
        """The URI Spark reads (its Hadoop file system's scheme)."""
        return f"{SCHEMES[self.scheme][1]}://{self.netloc}{self.path}"

    @property
    def arrow_path(self) -> str:
        """The path inside pyarrow's file system."""
        if self.scheme in ("file", "hdfs"):
            return self.path or "/"
        if self.scheme in ("abfs", "abfss"):
            return self.netloc.split("@", 1)[0] + self.path
        return self.netloc + self.path

    @property
    def segments(self) -> tuple[str, ...]:
        return tuple(part for part in self.path.split("/") if part)

    def local_path(self) -> Path | None:
        """The path on this machine of a ``file:`` URI (None for remote data)."""
        return Path(self.path) if self.scheme == "file" else None

    def child(self, relative: str) -> Uri:
        """The file ``relative`` (a ``/``-separated path) below this location."""
        sep = "" if self.text.endswith("/") else "/"
        return dataclasses.replace(
            self, text=f"{self.text}{sep}{relative}", path=f"{self.path.rstrip('/')}/{relative}"
        )

    def within(self, root: Uri) -> bool:
        return self == root or self.text.startswith(root.text.rstrip("/") + "/")


def is_uri(text: str) -> bool:
    """Whether a data location is written as a URI (``scheme:...``), not a path."""
    return _URI.match(text) is not None


def parse_uri(text: str) -> Uri:
    """The checked URI of a data location, or UriError saying what is wrong with it."""
    match = _URI.match(text)
    scheme = match.group(1).lower() if match else ""
    accepted = ", ".join(f"{s}://" for s in SCHEMES)
    if scheme not in SCHEMES:
        raise UriError(
            f"unknown URI scheme '{scheme}:' (accepted: {accepted})", closest(scheme, SCHEMES)
        )
    bad = sorted({c for c in text if c in _NOT_ALLOWED})
    if bad:
        raise UriError(
            f"a data URI may not hold {' '.join(repr(c) for c in bad)}: no queries, escapes or"
            " glob patterns; storage settings come from the environment or --spark-conf"
        )
    try:
        parts = urlsplit(text)
    except ValueError as err:
        raise UriError(f"not a valid URI: {err}") from None
    netloc, path = parts.netloc, parts.path
    if scheme == "file":
        if netloc or not path.startswith("/"):
            raise UriError("a file URI names a file of this machine: file:///absolute/path")
    else:
        _check_authority(scheme, text, netloc)
    if len(path) > 1:
        path = path.removesuffix("/")
        text = text.removesuffix("/")
    if any(seg in ("", ".", "..") for seg in path.split("/")[1:]):
        raise UriError(
            "a data URI may not hold '.', '..' or empty path segments (they would name"
            " another location than the one written)"
        )
    return Uri(text=text, scheme=scheme, netloc=netloc, path=path)


def _check_authority(scheme: str, text: str, netloc: str) -> None:
    form = {
        "hdfs": "hdfs://namenode:port/path",
        "abfs": "abfs://container@account.dfs.core.windows.net/path",
        "abfss": "abfss://container@account.dfs.core.windows.net/path",
    }.get(scheme, f"{scheme}://bucket/path")
    if not text[len(scheme) :].startswith("://") or not netloc:
        raise UriError(f"expected {form}")
    userinfo, at, host = netloc.rpartition("@")
    if scheme in ("abfs", "abfss"):
        if not at or not userinfo or ":" in userinfo or not host:
            raise UriError(f"expected {form} (credentials do not belong in the spec)")
    elif at:
        raise UriError(f"credentials do not belong in the spec: expected {form}")
    elif scheme not in ("hdfs",) and ":" in netloc:
        raise UriError(f"expected {form} (a bucket name, no port)")


# ----------------------------------------------------------------- opening file systems


def s3_options(settings: Mapping[str, str], env: Mapping[str, str], bucket: str) -> dict[str, Any]:
    """pyarrow S3FileSystem options from the Hadoop S3A keys (``fs.s3a.*``, per bucket
    ``fs.s3a.bucket.NAME.*`` first), then the standard AWS variables of the endpoint (which
    pyarrow ignores) and of the region; pyarrow reads the credentials chain (variables,
    ``~/.aws`` files, instance role) when no key pair is set."""

    def s3a(key: str) -> str | None:
        return settings.get(f"fs.s3a.bucket.{bucket}.{key}") or settings.get(f"fs.s3a.{key}")

    options: dict[str, Any] = {"connect_timeout": CONNECT_TIMEOUT_S}
    endpoint = s3a("endpoint") or env.get("AWS_ENDPOINT_URL_S3") or env.get("AWS_ENDPOINT_URL")
    if endpoint:
        transport, sep, host = endpoint.partition("://")
        if not sep:
            ssl = (s3a("connection.ssl.enabled") or "true").strip().lower() != "false"
            transport, host = ("https" if ssl else "http"), endpoint
        options["endpoint_override"] = host.rstrip("/")
        options["scheme"] = transport.lower()
    region = s3a("endpoint.region") or env.get("AWS_REGION") or env.get("AWS_DEFAULT_REGION")
    if region:
        options["region"] = region
    access, secret = s3a("access.key"), s3a("secret.key")
    if access and secret:
        options.update(access_key=access, secret_key=secret)
        token = s3a("session.token")
        if token:
            options["session_token"] = token
    elif "Anonymous" in (s3a("aws.credentials.provider") or ""):
        options["anonymous"] = True
    return options


def connect(uri: Uri, settings: Mapping[str, str], env: Mapping[str, str]) -> Uri:
    """``uri`` with its pyarrow file system opened (nothing is read yet, except for HDFS,
    which connects at once)."""
    import pyarrow.fs as pafs

    arrow_scheme = SCHEMES[uri.scheme][0]
    try:
        if arrow_scheme == "file":
            fs = pafs.LocalFileSystem()
        elif arrow_scheme == "s3":
            options = s3_options(settings, env, uri.netloc)
            retry = pafs.AwsStandardS3RetryStrategy(max_attempts=S3_ATTEMPTS)
            fs = pafs.S3FileSystem(retry_strategy=retry, **options)
        elif arrow_scheme == "gs":
            fs = pafs.GcsFileSystem(retry_time_limit=dt.timedelta(seconds=GCS_RETRY_S))
        else:  # abfs, abfss, hdfs: their own URI parsing (the URI holds no query)
            fs, _ = pafs.FileSystem.from_uri(f"{arrow_scheme}://{uri.netloc}{uri.path}")
    except (ImportError, OSError, ValueError, RuntimeError) as err:
        raise StorageError(f"cannot open {uri.text}: {describe(err, uri.scheme)}") from None
    return dataclasses.replace(uri, fs=fs)


def describe(err: BaseException, scheme: str) -> str:
    """One line about a file-system error: what is missing (library, credentials, network),
    then the first line of the error itself."""
    first = next((ln.strip() for ln in str(err).splitlines() if ln.strip()), type(err).__name__)
    # "When listing objects under key 'x' in bucket 'y': ..." repeats the location
    first = re.sub(r"^When [^:]+ in bucket '[^']*': ", "", first)[:240]
    text = str(err)
    arrow_scheme = SCHEMES.get(scheme, (scheme, scheme))[0]
    if isinstance(err, ImportError) or re.search(
        r"compiled without|not built with|libjvm|libhdfs|support not enabled", text, re.I
    ):
        need = _LIBRARIES.get(arrow_scheme, f"this pyarrow has no {arrow_scheme} support")
        return f"missing library: {need} ({first})"
    if re.search(
        r"ACCESS_DENIED|INVALID_ACCESS_KEY|SIGNATURE_DOES_NOT_MATCH|EXPIRED_TOKEN|credential"
        r"|Unauthori[sz]ed|HTTP status 40[13]|AuthenticationFailed|AuthorizationFailure"
        r"|PERMISSION_DENIED|UNAUTHENTICATED",
        text,
        re.I,
    ):
        return f"credentials refused or missing (from {CREDENTIALS[arrow_scheme]}): {first}"
    if re.search(
        r"NETWORK_CONNECTION|Could not connect|Could not resolve|Connection refused|timed out"
        r"|Timeout|UNAVAILABLE",
        text,
        re.I,
    ):
        return f"cannot reach the storage service (endpoint, network or proxy): {first}"
    if re.search(r"PermanentRedirect|HTTP status 301|region", text):
        return f"wrong region: set AWS_REGION or spark.hadoop.fs.s3a.endpoint.region ({first})"
    return first


def parquet_files(root: Uri) -> list[Uri]:
    """The Parquet files ``root`` names: the file itself, or every ``*.parquet`` below the
    folder (or key prefix), sorted; only metadata is read. A file below a ``file:`` folder
    must lie inside it after symbolic links are followed."""
    import pyarrow.fs as pafs

    fs = root.fs
    try:
        info = fs.get_file_info(root.arrow_path)
        if info.type == pafs.FileType.File:
            return [root]
        if info.type == pafs.FileType.NotFound:
            raise StorageError(f"{root.text}: not found", absent=True)
        if info.type != pafs.FileType.Directory:
            raise StorageError(f"{root.text}: neither a regular file nor a folder")
        below = fs.get_file_info(pafs.FileSelector(root.arrow_path, recursive=True))
    except (OSError, ValueError) as err:
        raise StorageError(f"cannot list {root.text}: {describe(err, root.scheme)}") from None
    prefix = root.arrow_path.rstrip("/") + "/"
    files = []
    for item in below:
        if item.type != pafs.FileType.File or not item.base_name.endswith(".parquet"):
            continue
        if not item.path.startswith(prefix):
            raise StorageError(f"{root.text}: the listing returned {item.path}, outside it")
        relative = item.path[len(prefix) :]
        if (
            any(seg in ("", ".", "..") for seg in relative.split("/"))
            or any(c in _NOT_ALLOWED for c in relative)
            or not relative.isprintable()
        ):
            raise StorageError(
                f"{root.text}: the file name {relative!r} holds '.', '..', empty segments,"
                " escapes, glob or control characters; it cannot be named exactly"
            )
        files.append(root.child(relative))
    files.sort(key=lambda f: f.text)
    local = root.local_path()
    if local is not None:
        for f in files:
            path = f.local_path()
            assert path is not None
            if not path.resolve().is_relative_to(local.resolve()):
                raise StorageError(
                    f"{f.text}: a symbolic link in the data folder points outside it"
                )
    if not files:
        raise StorageError(f"{root.text}: no .parquet files under it", absent=True)
    return files
