"""archive.hrefs: URLs fit for messages, and hrefs from an untrusted shelf kept inside its root."""

from __future__ import annotations

import pytest

from archive.hrefs import redact, safe_href


@pytest.mark.parametrize(("url", "shown"), [
    # reference: RFC 3986 §3.2.1 (userinfo) and §3.4 (query), written out by hand
    ("s3://key:secret@bucket/site", "s3://bucket/site"),
    ("https://user:pw@data.example.org:8443/site/?X-Amz-Signature=abc#x", "https://data.example.org:8443/site/"),
    ("https://data.example.org/site", "https://data.example.org/site"),
    ("/data/shelf", "/data/shelf"),
    ("C:\\shelves\\site", "C:\\shelves\\site"),  # a drive letter is not a scheme
    ("file:///data/shelf", "file:///data/shelf"),
])
def test_redact_drops_credentials_and_query(url, shown):
    assert redact(url) == shown


@pytest.mark.parametrize(("href", "norm"), [
    ("points/station=a/year=2026/a-20260901T060000Z.parquet", "points/station=a/year=2026/a-20260901T060000Z.parquet"),
    ("./scans/../points/x.parquet", "points/x.parquet"),
])
def test_safe_href_normalises_paths_inside_the_root(href, norm):
    assert safe_href(href, "items.parquet") == norm


@pytest.mark.parametrize("href", ["../x", "a/../../x", "/etc/passwd", "\\\\host\\share", "file:///etc/passwd",
                                  "https://elsewhere.example/x", "s3://bucket/x", "a\\..\\..\\x"])
def test_safe_href_refuses_leaving_the_root(href):
    with pytest.raises(ValueError, match=r"^items\.parquet: href .* refused$"):
        safe_href(href, "items.parquet")
