"""``/docs`` works without internet: the page and every asset it references come from the
service itself (files shipped in the installed package), none from another host.

The page is parsed with the standard library's ``html.parser`` (every ``src`` and ``href``);
each reference must be a path on this server and answer 200 with the content type a browser
needs. The assets are checked to be the Swagger UI release that reads OpenAPI 3.1 (the
version the service publishes), and the stylesheet to reference no remote URL.
"""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urljoin, urlsplit

import httpx

from tests.service.conftest import LiveServer


class _Refs(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.refs: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        for name, value in attrs:
            if name in ("src", "href") and value:
                self.refs.append(value)


def test_docs_page_and_every_asset_are_served_locally(tiny_graph_path: Path, tmp_path: Path):
    with LiveServer(tiny_graph_path, tmp_path) as srv:
        page = httpx.get(srv.url + "/docs")
        assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
        parser = _Refs()
        parser.feed(page.text)
        assert len(parser.refs) >= 3, parser.refs  # script, stylesheet, icon
        for ref in parser.refs:
            url = urljoin(srv.url + "/docs", ref)
            assert urlsplit(url).netloc == urlsplit(srv.url).netloc, f"{ref} is not local"
            r = httpx.get(url)
            assert r.status_code == 200 and len(r.content) > 100, (ref, r.status_code)
            kind = r.headers["content-type"]
            if ref.endswith(".js"):
                assert "javascript" in kind
                # Swagger UI 5 (OpenAPI 3.1 support); the bundle carries its version string
                assert re.search(rb'PACKAGE_VERSION:"5\.\d+\.\d+"', r.content)
            elif ref.endswith(".css"):
                assert "text/css" in kind
                remote = re.findall(rb"url\((?!data:)[\"']?(https?:)", r.content)
                assert remote == [], "the stylesheet loads something remote"
        # the page points the UI at this server's schema and switches the online validator off
        assert "url: '/openapi.json'" in page.text and '"validatorUrl": null' in page.text
        assert "cdn" not in page.text.lower()
        assert httpx.get(srv.url + "/openapi.json").json()["openapi"].startswith("3.1")
        assert httpx.get(srv.url + "/redoc").status_code == 404  # not offered: it needs a CDN
