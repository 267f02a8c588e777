"""Loading a message's localization: from a file, from base64 in the message, or from https.

This is I/O at the edge: it reads bytes (with a size cap), hands them to
:func:`matcher.sky.read_skymap`, and returns both, so the store can keep the
exact bytes of every localization it accepted (a restart never re-fetches a URL
or re-reads a file that may have changed).

- **path**: resolved against the message's folder (an inbox or archive folder).
  It must stay inside that folder or one of ``local_roots``; a message cannot
  make the service read arbitrary files, and a message with no folder (one from
  a network stream) cannot name a local file at all unless ``local_roots`` allows it.
- **base64**: decoded strictly (RFC 4648 alphabet); its size is checked before decoding.
- **url**: only ``https://`` URLs matching an entry of ``url_allow_list`` (empty by
  default, so no URL is fetched until an operator lists one). An entry is a URL
  prefix, ``https://host[:port]/path/``; host and port must match exactly and the
  path must start with the entry's path. Redirects are followed only to allowed
  URLs. Connect and read timeouts and a total deadline apply; the body is read in
  chunks and abandoned past the size cap.

Every refusal raises :class:`~matcher.errors.SkyMapError` naming the localization
and the reason, which the service quarantines with the message.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import os
import time
import urllib.error
import urllib.parse
import urllib.request
from dataclasses import dataclass, field
from typing import Callable

from matcher.errors import SkyMapError
from matcher.sky import SkyMap, read_skymap
from matcher.streams.messages import Localization

__all__ = [
    "LocalizationLimits",
    "LoadedLocalization",
    "load_localization",
    "localization_bytes",
    "url_allowed",
    "DEFAULT_LOCALIZATION_MAX_BYTES",
]

#: Default size cap for one localization file (bytes); multi-order maps are a few MB.
DEFAULT_LOCALIZATION_MAX_BYTES = 64 * 1024 * 1024
_CHUNK = 1 << 16


@dataclass(frozen=True)
class LocalizationLimits:
    """Limits on loading localizations.

    Attributes
    ----------
    max_bytes : int, bytes
        Cap on the file, the decoded base64, or the downloaded body (and, inside
        :func:`read_skymap`, on the decompressed size).
    url_allow_list : tuple of str
        Allowed https URL prefixes (empty: no URL is fetched).
    connect_timeout_s : float, s
        Socket timeout for connecting and for each read.
    total_timeout_s : float, s
        Deadline for a whole download.
    local_roots : tuple of str
        Folders besides the message's own from which a path may be read.
    """

    max_bytes: int = DEFAULT_LOCALIZATION_MAX_BYTES
    url_allow_list: tuple[str, ...] = ()
    connect_timeout_s: float = 10.0
    total_timeout_s: float = 60.0
    local_roots: tuple[str, ...] = field(default_factory=tuple)


@dataclass(frozen=True)
class LoadedLocalization:
    """A localization's exact bytes, their SHA-256 (hex), the parsed map, and where it came from."""

    data: bytes
    sha256: str
    skymap: SkyMap
    where: str


def _inside(path: str, root: str) -> bool:
    root = os.path.realpath(root)
    return os.path.commonpath([path, root]) == root


def _path_bytes(loc: Localization, limits: LocalizationLimits) -> tuple[bytes, str]:
    resolved = loc.resolved_path()
    name = loc.path
    if not os.path.isabs(resolved) and not loc.base_dir:
        resolved = os.path.abspath(resolved)
    real = os.path.realpath(resolved)
    roots = ([loc.base_dir] if loc.base_dir else []) + list(limits.local_roots)
    if not roots:
        raise SkyMapError(name, "local paths are not accepted from a source with no folder "
                                "(limits.local_roots lists folders that may be read)")
    if not any(_inside(real, r) for r in roots):
        raise SkyMapError(name, f"resolves to {real}, outside the message's folder"
                                f"{' and limits.local_roots' if limits.local_roots else ''}")
    try:
        size = os.stat(real).st_size
        if size > limits.max_bytes:
            raise SkyMapError(name, f"file is {size} bytes, over the {limits.max_bytes}-byte limit "
                                    "(limits.localization_max_bytes)")
        with open(real, "rb") as fh:
            data = fh.read(limits.max_bytes + 1)
    except OSError as exc:
        raise SkyMapError(name, f"cannot read {real}: {exc.strerror or exc}") from None
    if len(data) > limits.max_bytes:
        raise SkyMapError(name, f"file grew past the {limits.max_bytes}-byte limit while being read")
    return data, real


def _base64_bytes(loc: Localization, limits: LocalizationLimits) -> tuple[bytes, str]:
    text = loc.fits_base64
    name = "localization.fits_base64"
    approx = (len(text) * 3) // 4
    if approx > limits.max_bytes + 3:
        raise SkyMapError(name, f"decodes to about {approx} bytes, over the {limits.max_bytes}-byte limit "
                                "(limits.localization_max_bytes)")
    try:
        data = base64.b64decode("".join(text.split()), validate=True)
    except (binascii.Error, ValueError) as exc:
        raise SkyMapError(name, f"is not valid base64: {exc}") from None
    if len(data) > limits.max_bytes:
        raise SkyMapError(name, f"decodes to {len(data)} bytes, over the {limits.max_bytes}-byte limit")
    return data, "<base64 in the message>"


def _parse_prefix(entry: str):
    u = urllib.parse.urlsplit(entry)
    path = u.path or "/"
    return u.scheme.lower(), (u.hostname or "").lower(), u.port, path


def url_allowed(url: str, allow_list) -> bool:
    """True when ``url`` is https and matches an allow-list prefix (same host and port, path prefix).

    Examples
    --------
    >>> url_allowed("https://maps.example.org/ev/1.fits", ["https://maps.example.org/ev/"])
    True
    >>> url_allowed("https://maps.example.org.evil.test/ev/1.fits", ["https://maps.example.org/"])
    False
    """
    try:
        u = urllib.parse.urlsplit(url)
        port = u.port
    except ValueError:
        return False
    if u.scheme.lower() != "https" or u.username is not None or u.password is not None or not u.hostname:
        return False
    host = u.hostname.lower()
    path = u.path or "/"
    for entry in allow_list:
        scheme, ehost, eport, epath = _parse_prefix(entry)
        if scheme != "https" or ehost != host or (eport or 443) != (port or 443):
            continue
        if path.startswith(epath if epath.endswith("/") else epath + "/") or path == epath:
            return True
    return False


class _AllowListRedirect(urllib.request.HTTPRedirectHandler):
    def __init__(self, allow_list):
        self.allow_list = allow_list

    def redirect_request(self, req, fp, code, msg, headers, newurl):
        if not url_allowed(newurl, self.allow_list):
            raise SkyMapError(req.full_url, f"redirects to {newurl[:120]}, which is not in limits.url_allow_list")
        return super().redirect_request(req, fp, code, msg, headers, newurl)


def _default_opener(allow_list) -> Callable:
    opener = urllib.request.build_opener(_AllowListRedirect(allow_list))
    return opener.open


def _url_bytes(loc: Localization, limits: LocalizationLimits, opener: Callable | None) -> tuple[bytes, str]:
    url = loc.url
    if not url_allowed(url, limits.url_allow_list):
        why = ("the allow-list is empty, so no URL is fetched" if not limits.url_allow_list
               else f"it matches none of {len(limits.url_allow_list)} allowed prefixes")
        raise SkyMapError(url[:200], f"URL is not in limits.url_allow_list ({why})")
    open_url = opener or _default_opener(limits.url_allow_list)
    deadline = time.monotonic() + limits.total_timeout_s
    try:
        req = urllib.request.Request(url, headers={"User-Agent": "matcher", "Accept-Encoding": "identity"})
        with open_url(req, timeout=limits.connect_timeout_s) as resp:
            length = resp.headers.get("Content-Length") if getattr(resp, "headers", None) is not None else None
            if length is not None and length.strip().isdigit() and int(length) > limits.max_bytes:
                raise SkyMapError(url, f"Content-Length {int(length)} is over the {limits.max_bytes}-byte limit")
            chunks, total = [], 0
            while True:
                if time.monotonic() > deadline:
                    raise SkyMapError(url, f"download took longer than {limits.total_timeout_s} s "
                                           "(limits.url_total_timeout_s)")
                chunk = resp.read(_CHUNK)
                if not chunk:
                    break
                total += len(chunk)
                if total > limits.max_bytes:
                    raise SkyMapError(url, f"body exceeds the {limits.max_bytes}-byte limit (download abandoned)")
                chunks.append(chunk)
    except SkyMapError:
        raise
    except urllib.error.HTTPError as exc:
        raise SkyMapError(url, f"HTTP {exc.code} {exc.reason}") from None
    except urllib.error.URLError as exc:
        raise SkyMapError(url, f"cannot fetch: {exc.reason}") from None
    except (OSError, ValueError) as exc:  # timeouts are OSError
        raise SkyMapError(url, f"cannot fetch: {exc}") from None
    return b"".join(chunks), url


def localization_bytes(loc: Localization, limits: LocalizationLimits = LocalizationLimits(), *,
                       opener: Callable | None = None) -> tuple[bytes, str]:
    """The raw bytes of a localization and where they came from (a real path, the URL, or base64).

    Parameters
    ----------
    loc : Localization
    limits : LocalizationLimits
    opener : callable, optional
        ``opener(request, timeout=...)`` returning a response with ``read(n)`` and
        ``headers``; defaults to urllib with allow-list-checked redirects.

    Raises
    ------
    SkyMapError
    """
    if loc.path is not None:
        return _path_bytes(loc, limits)
    if loc.fits_base64 is not None:
        return _base64_bytes(loc, limits)
    if loc.url is not None:
        return _url_bytes(loc, limits, opener)
    raise SkyMapError("localization", "has none of path, url, fits_base64")


def load_localization(loc: Localization, limits: LocalizationLimits = LocalizationLimits(), *,
                      opener: Callable | None = None) -> LoadedLocalization:
    """Read and parse a localization.

    Returns
    -------
    LoadedLocalization
        The exact bytes, their SHA-256, the :class:`~matcher.sky.SkyMap` and the origin.

    Raises
    ------
    SkyMapError
        Refused (outside the folder, URL not allowed, over the size cap, timeout) or not a
        usable HEALPix map.
    """
    data, where = localization_bytes(loc, limits, opener=opener)
    skymap = read_skymap(data, max_bytes=limits.max_bytes, source=where)
    return LoadedLocalization(data, hashlib.sha256(data).hexdigest(), skymap, where)
