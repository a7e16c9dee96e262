"""Shared pieces of the review page's tests: a small workspace with a hostile series
name, a client for the page's HTTP API, and a snapshot of the files it may write."""

from __future__ import annotations

import json
import re
import urllib.error
import urllib.request
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

from tests.synthetic import make_workspace

HOSTILE = "<script>alert(1)</script>"


def review_workspace(root: Path) -> Path:
    """The synthetic workspace with market 'm2' renamed to a string that would run as
    script if the page inserted it as HTML."""
    ws = make_workspace(root)
    for name in ("history.csv", "owners.csv", "incidents.csv"):
        p = root / name
        text = p.read_text(encoding="utf-8")
        p.write_text(re.sub(r"(?m)(?<=,)m2(?=,)|^m2(?=,)", HOSTILE, text), encoding="utf-8")
    return ws


class Client:
    """Minimal HTTP client for the page's API (stdlib only), bounded by a timeout."""

    def __init__(self, url: str):
        parts = urlsplit(url)
        self.base = f"{parts.scheme}://{parts.netloc}"
        self.token = parse_qs(parts.query)["token"][0]

    def call(self, method: str, path: str, body=None, token: str | None = "",
             raw: bytes | None = None) -> tuple[int, dict | str]:
        """(status, JSON body or text); `token` None sends none, "" the right one."""
        data = raw if raw is not None else (None if body is None else json.dumps(body).encode())
        req = urllib.request.Request(self.base + path, data=data, method=method)
        req.add_header("Content-Type", "application/json")
        if token is not None:
            req.add_header("X-Review-Token", token or self.token)
        try:
            with urllib.request.urlopen(req, timeout=10) as res:
                status, payload, ctype = res.status, res.read(), res.headers["Content-Type"]
        except urllib.error.HTTPError as err:
            status, payload, ctype = err.code, err.read(), err.headers["Content-Type"]
        if ctype and ctype.startswith("application/json"):
            return status, json.loads(payload)
        return status, payload.decode("utf-8", "replace")


def snapshot(*paths: Path | None) -> dict[str, bytes | None]:
    """The bytes of each file (None when absent)."""
    return {str(p): (p.read_bytes() if p is not None and p.exists() else None)
            for p in paths if p is not None}
