"""Loading localizations: paths confined to the message's folder, strict base64, the URL
allow-list and size caps. No test reaches the network: URL refusals happen before any
connection (the opener given would fail the test if called), and the download size cap is
exercised with an opener that serves local bytes."""

from __future__ import annotations

import base64
import hashlib
import io
import os

import pytest

from matcher.errors import SkyMapError
from matcher.streams.localization import (
    LocalizationLimits,
    load_localization,
    localization_bytes,
    url_allowed,
)
from matcher.streams.messages import Localization
from streams_helpers import tiny_map_bytes


def never_called(*args, **kwargs):
    raise AssertionError("the network must not be reached")


class LocalResponse:
    """Serves bytes held in memory, like an HTTP response (headers + read)."""

    def __init__(self, data: bytes, length: str | None = None):
        self._buf = io.BytesIO(data)
        self.headers = {} if length is None else {"Content-Length": length}

    def read(self, n=-1):
        return self._buf.read(n)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def test_path_relative_to_the_message_folder(tmp_path):
    data = tiny_map_bytes()
    (tmp_path / "maps").mkdir()
    (tmp_path / "maps" / "ev.fits").write_bytes(data)
    loaded = load_localization(Localization(path="maps/ev.fits", base_dir=str(tmp_path)))
    assert loaded.data == data and loaded.sha256 == hashlib.sha256(data).hexdigest()
    assert loaded.skymap.uniq.size == 12 and loaded.where == str((tmp_path / "maps" / "ev.fits").resolve())


def test_path_outside_the_folder_is_refused(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    (tmp_path / "secret.fits").write_bytes(tiny_map_bytes())
    with pytest.raises(SkyMapError, match="outside the message's folder"):
        load_localization(Localization(path="../secret.fits", base_dir=str(inbox)))
    with pytest.raises(SkyMapError, match="outside the message's folder"):
        load_localization(Localization(path=str(tmp_path / "secret.fits"), base_dir=str(inbox)))
    os.symlink(tmp_path / "secret.fits", inbox / "link.fits")
    with pytest.raises(SkyMapError, match="outside"):
        load_localization(Localization(path="link.fits", base_dir=str(inbox)))
    # An operator can allow another folder explicitly.
    ok = load_localization(Localization(path=str(tmp_path / "secret.fits"), base_dir=str(inbox)),
                           LocalizationLimits(local_roots=(str(tmp_path),)))
    assert ok.skymap.uniq.size == 12
    # A message with no folder (a network stream) cannot name a local file at all.
    with pytest.raises(SkyMapError, match="no folder"):
        load_localization(Localization(path=str(tmp_path / "secret.fits")))


def test_unreadable_and_oversized_files(tmp_path):
    with pytest.raises(SkyMapError, match="cannot read"):
        load_localization(Localization(path="missing.fits", base_dir=str(tmp_path)))
    (tmp_path / "big.fits").write_bytes(tiny_map_bytes())
    with pytest.raises(SkyMapError, match="over the 4096-byte limit"):
        load_localization(Localization(path="big.fits", base_dir=str(tmp_path)), LocalizationLimits(max_bytes=4096))
    (tmp_path / "junk.fits").write_bytes(b"SIMPLE  = nonsense" * 10)
    with pytest.raises(SkyMapError):
        load_localization(Localization(path="junk.fits", base_dir=str(tmp_path)))


def test_base64(tmp_path):
    data = tiny_map_bytes()
    text = base64.b64encode(data).decode()
    assert load_localization(Localization(fits_base64=text)).data == data
    # Line breaks (MIME style) are allowed; other characters are not.
    wrapped = "\n".join(text[i:i + 76] for i in range(0, len(text), 76))
    assert load_localization(Localization(fits_base64=wrapped)).data == data
    with pytest.raises(SkyMapError, match="not valid base64"):
        load_localization(Localization(fits_base64=text[:100] + "*" + text[101:]))
    with pytest.raises(SkyMapError, match="over the 4096-byte limit"):
        load_localization(Localization(fits_base64=text), LocalizationLimits(max_bytes=4096))


@pytest.mark.parametrize("url, ok", [
    ("https://maps.example.org/alerts/EV1/map.fits", True),
    ("https://MAPS.example.org/alerts/x.fits", True),
    ("https://maps.example.org:443/alerts/x.fits", True),
    ("https://maps.example.org/alertsX/x.fits", False),
    ("https://maps.example.org/other/x.fits", False),
    ("https://maps.example.org.attacker.test/alerts/x.fits", False),
    ("https://user@maps.example.org/alerts/x.fits", False),
    ("https://maps.example.org:8443/alerts/x.fits", False),
    ("http://maps.example.org/alerts/x.fits", False),
])
def test_allow_list_matching(url, ok):
    assert url_allowed(url, ["https://maps.example.org/alerts/"]) is ok


def test_url_outside_the_allow_list_is_refused_without_a_connection():
    loc = Localization(url="https://maps.example.org/alerts/EV1.fits")
    with pytest.raises(SkyMapError, match="allow-list is empty"):
        load_localization(loc, opener=never_called)
    with pytest.raises(SkyMapError, match="matches none of 1 allowed"):
        load_localization(loc, LocalizationLimits(url_allow_list=("https://other.example.org/",)), opener=never_called)


def test_download_size_cap_and_success_with_local_bytes():
    data = tiny_map_bytes()
    limits = LocalizationLimits(url_allow_list=("https://maps.example.org/",))
    loc = Localization(url="https://maps.example.org/EV1.fits")
    got = load_localization(loc, limits, opener=lambda req, timeout: LocalResponse(data))
    assert got.data == data and got.where == loc.url
    small = LocalizationLimits(max_bytes=4096, url_allow_list=limits.url_allow_list)
    with pytest.raises(SkyMapError, match="Content-Length 8640 is over the 4096-byte limit"):
        localization_bytes(loc, small, opener=lambda req, timeout: LocalResponse(data, str(len(data))))
    # A server that does not announce the length is cut off once the body passes the cap.
    with pytest.raises(SkyMapError, match="body exceeds the 4096-byte limit"):
        localization_bytes(loc, small, opener=lambda req, timeout: LocalResponse(data))


def test_network_errors_become_reasons():
    import urllib.error

    limits = LocalizationLimits(url_allow_list=("https://maps.example.org/",), connect_timeout_s=0.5)
    loc = Localization(url="https://maps.example.org/EV1.fits")

    def refuse(req, timeout):
        assert timeout == 0.5
        raise urllib.error.URLError("connection refused")

    with pytest.raises(SkyMapError, match="cannot fetch: connection refused"):
        localization_bytes(loc, limits, opener=refuse)

    def timeout(req, timeout):
        raise TimeoutError("timed out")

    with pytest.raises(SkyMapError, match="timed out"):
        localization_bytes(loc, limits, opener=timeout)
