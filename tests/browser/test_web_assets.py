"""The page's files as the service serves them (over ASGI, no browser needed): the right
content types, a policy that keeps the page on its own origin, and nothing outside the
web directory reachable."""

from __future__ import annotations

import re

import httpx
import pytest

from phaseward.api.routes.web import ASSETS, WEB_DIR

pytestmark = pytest.mark.anyio

EXPECTED_TYPES = {
    "app.js": "text/javascript",
    "api.js": "text/javascript",
    "charts.js": "text/javascript",
    "dom.js": "text/javascript",
    "format.js": "text/javascript",
    "glyphs.js": "text/javascript",
    "live.js": "text/javascript",
    "style.css": "text/css",
    "icon.svg": "image/svg+xml",
}


@pytest.mark.parametrize("path", ["/", "/rails/bench-a"])
async def test_page_is_html_with_a_same_origin_policy(client: httpx.AsyncClient, path: str) -> None:
    answer = await client.get(path)
    assert answer.status_code == 200
    assert answer.headers["content-type"].startswith("text/html")
    assert answer.text == (WEB_DIR / "index.html").read_text(encoding="utf-8")
    policy = answer.headers["content-security-policy"]
    assert "default-src 'none'" in policy
    assert "connect-src 'self'" in policy
    assert "script-src 'self'" in policy


async def test_every_asset_has_its_content_type(client: httpx.AsyncClient) -> None:
    assert set(ASSETS) == set(EXPECTED_TYPES)
    for name, media in EXPECTED_TYPES.items():
        answer = await client.get(f"/static/{name}")
        assert answer.status_code == 200, name
        assert answer.headers["content-type"].split(";")[0] == media, name
        assert answer.headers["x-content-type-options"] == "nosniff"
        assert answer.content == (WEB_DIR / name).read_bytes()


async def test_the_page_names_only_its_own_assets(client: httpx.AsyncClient) -> None:
    html = (await client.get("/")).text
    referenced = re.findall(r'(?:src|href)="([^"]+)"', html)
    assert referenced, "the page references no assets"
    for ref in referenced:
        assert ref.startswith(("/", "#")), ref
        assert not ref.startswith("//"), ref
    for name in ("app.js", "style.css", "icon.svg"):
        assert f'"/static/{name}"' in html
    scripts = {name: (WEB_DIR / name).read_text(encoding="utf-8") for name in ASSETS}
    for name, text in scripts.items():
        assert "http://" not in text.replace("http://www.w3.org/2000/svg", ""), name
        assert "https://" not in text, name
        for module in re.findall(r"from '(\.[^']+)'", text):
            assert module.removeprefix("./") in ASSETS, f"{name} imports {module}"


@pytest.mark.parametrize(
    "path",
    ["/static/nope.js", "/static/index.html", "/static/..%2Froutes%2Fweb.py", "/static/%2e%2e"],
)
async def test_nothing_else_is_served(client: httpx.AsyncClient, path: str) -> None:
    answer = await client.get(path)
    assert answer.status_code == 404
    assert "def asset" not in answer.text
    assert "<script" not in answer.text


async def test_a_bad_rail_id_in_the_page_path_is_refused(client: httpx.AsyncClient) -> None:
    answer = await client.get("/rails/Not_A_Slug")
    assert answer.status_code == 422
