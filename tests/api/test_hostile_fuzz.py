"""A seeded fuzz over every route of the app, as every kind of caller: no input reaches a server error.

Every (method, path) of ``app.routes`` is called as an anonymous client, a device, a personal API
token of each staff role and a signed-in browser session (with its CSRF token), with hostile path
values, query strings, JSON, form, empty and oversized bodies. Each answer must be below 500, and an
error answered as JSON must carry ``{"error": {"code": str, "message": str}}``. The whole walk runs
on SQLite; PostgreSQL runs a seeded sample of it. Every case is reproducible from its route, caller
and case number (the seed is a string, hashed the same way on every run).
"""

from __future__ import annotations

import datetime as dt
import json
import random
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any
from urllib.parse import quote

import pytest
from fastapi import FastAPI
from fastapi.responses import JSONResponse
from fastapi.testclient import TestClient
from pydantic import BaseModel

from server.app import create_app
from server.auth import service as auth_service
from server.roles import ROLES
from server.settings import Settings
from server.web.templating import TEMPLATES_DIR
from tests import factories
from tests.api.test_staff_access import all_routes
from tests.conftest import committed_session, csrf_of, sign_in

SEED = "trialhouse-fuzz-1"
BODY_LIMIT = 32 * 1024  # a small cap, so oversized bodies stay cheap to send
BIG = 2**63
TEN_KB = "A" * 10240

# Path segments, already percent-encoded where they must be (a lone surrogate as its UTF-8-style
# bytes and as the JSON-style escape text, a NUL, a traversal with encoded and with raw slashes).
PATH_VALUES = [
    str(BIG),
    str(BIG * 8),
    "-1",
    f"-{BIG + 1}",
    "0",
    "%00",
    "%ED%A0%80",
    quote("\\ud800"),
    TEN_KB,
    "..%2F..%2Fetc%2Fpasswd",
    "..%252F..%252Fetc",
    "%FF%FE",
    "1.5",
    "1e308",
    "%20",
    "null",
]
# Query values, raw (encoded when the query string is built) unless marked pre-encoded with '%'.
QUERY_VALUES = [
    str(BIG),
    "-1",
    "0",
    "%00",
    "%ED%A0%80",
    "%5Cud800",
    TEN_KB,
    "..%2F..%2Fetc%2Fpasswd",
    "",
    "true",
    "2026-13-45",
    "9999-12-31",
    "0000-01-01",
    "%FF",
    "1e308",
    "nan",
    "-0",
]
# JSON values of the wrong type or out of range, as raw JSON text.
JSON_VALUES = [
    str(BIG),
    str(-BIG - 1),
    "1" + "0" * 400,
    "1e400",
    "-1",
    "0",
    "1.5",
    "true",
    "false",
    "null",
    '"\\ud800"',
    '"\\udfff tail"',
    '"\\u0000"',
    json.dumps(TEN_KB),
    '""',
    "[]",
    "{}",
    '["\\ud800"]',
    '{"a": null}',
    "[" * 600 + "]" * 600,
    '"2026-01-01"',
    '"2026-01-01T00:00:00"',
    '"9999-12-31T23:59:59+00:00"',
    '"=HYPERLINK(1)"',
    '"../../etc/passwd"',
    "1767225600",
]
FORM_VALUES = [
    str(BIG),
    "-1",
    "0",
    "\x00",
    "\ud800",
    TEN_KB,
    "../../etc/passwd",
    "",
    "on",
    "2026-13-45",
    "1e308",
    "nan",
    "\r\n",
    "=1+1",
]
CONTENT_TYPES = [
    "application/json",
    "application/x-www-form-urlencoded",
    "multipart/form-data",
    "multipart/form-data; boundary=x",
    "text/csv",
    "text/plain",
    None,
]


def field_names(app: FastAPI) -> list[str]:
    """Field names the app reads: body models of every route, plus every form field of the pages."""
    names: set[str] = {
        f for _, _, route, _ in all_routes(app) for m in body_models(route) for f in m.model_fields
    }
    for path in TEMPLATES_DIR.rglob("*.html"):
        names.update(re.findall(r'name="([a-z_][a-z0-9_]*)"', path.read_text(encoding="utf-8")))
    return sorted(names - {"csrf_token"})


def body_models(route: Any) -> list[type[BaseModel]]:
    out: list[type[BaseModel]] = []
    stack = [getattr(route, "dependant", None)]
    while stack:
        d = stack.pop()
        if d is None:
            continue
        for p in d.body_params:
            ann = p.field_info.annotation
            if isinstance(ann, type) and issubclass(ann, BaseModel):
                out.append(ann)
        stack.extend(d.dependencies)
    return out


def query_names(route: Any) -> list[str]:
    out: list[str] = []
    stack = [getattr(route, "dependant", None)]
    while stack:
        d = stack.pop()
        if d is None:
            continue
        out += [p.alias or p.name for p in d.query_params]
        stack.extend(d.dependencies)
    return out


@dataclass
class Case:
    method: str
    url: str
    kind: str
    headers: dict[str, str] = field(default_factory=dict)
    content: bytes | None = None
    chunked: bool = False

    def label(self) -> str:
        return f"{self.method} {self.url[:120]} [{self.kind}]"


class CaseMaker:
    """Builds the hostile cases of one route for one caller, from a string seed."""

    def __init__(
        self, method: str, path: str, route: Any, world: dict[str, str], vocabulary: list[str]
    ) -> None:
        self.method, self.path, self.route, self.world = method, path, route, world
        models = body_models(route)
        self.fields = sorted({f for m in models for f in m.model_fields}) or []
        self.query = query_names(route)
        self.vocabulary = vocabulary

    def url(self, rng: random.Random, real_ids: bool) -> str:
        def value(m: re.Match[str]) -> str:
            name = m.group(1)
            if real_ids and name in self.world:
                return quote(self.world[name], safe="")
            return rng.choice(PATH_VALUES)

        url = re.sub(r"\{(\w+)(:\w+)?\}", value, self.path)
        names = self.query + rng.sample(self.vocabulary, 2)
        pairs = []
        for name in rng.sample(names, rng.randint(0, min(4, len(names)))):
            v = rng.choice(QUERY_VALUES)
            pairs.append(f"{quote(name)}={v if v.startswith('%') else quote(v, safe='')}")
        if rng.random() < 0.15:
            pairs.append("&&=&" + "%00=%ED%A0%80")
        return url + ("?" + "&".join(pairs) if pairs else "")

    def json_body(self, rng: random.Random) -> bytes:
        shape = rng.random()
        if shape < 0.15:  # not an object at all, or not JSON
            return rng.choice(
                [
                    "[]",
                    "null",
                    "1",
                    '"\\ud800"',
                    "[" * 3000 + "]" * 3000,
                    "{",
                    '{"a":',
                    "\ufeff{}",
                    "NaN",
                    '{"a": NaN}',
                    '{"a": Infinity}',
                ]
            ).encode()
        if shape < 0.2:
            return b"\xff\xfe\x00{"
        names = list(self.fields) + rng.sample(self.vocabulary, 3)
        chosen = rng.sample(names, rng.randint(1, min(len(names), 8)))
        if self.fields and rng.random() < 0.5:  # every real field present, one or more hostile
            chosen = list(dict.fromkeys(self.fields + chosen))
        items = [f"{json.dumps(n)}: {rng.choice(JSON_VALUES)}" for n in chosen]
        if rng.random() < 0.1:
            items.append('"\\ud800": 1')
        if rng.random() < 0.1:  # a repeated key
            items.append(items[0])
        return ("{" + ", ".join(items) + "}").encode()

    def form_body(self, rng: random.Random, csrf: str | None) -> bytes:
        names = list(self.fields) + rng.sample(self.vocabulary, min(6, len(self.vocabulary)))
        pairs = []
        for name in rng.sample(names, rng.randint(1, min(len(names), 8))):
            pairs.append(f"{quote(name)}={quote(rng.choice(FORM_VALUES), safe='', errors='surrogatepass')}")
        if rng.random() < 0.2:
            pairs.append("%ED%A0%80=%ED%A0%80&trial=%00&trial=" + quote(str(BIG)))
        if csrf is not None and rng.random() < 0.9:
            pairs.append(f"csrf_token={quote(csrf)}")
        return "&".join(pairs).encode()

    def multipart_body(self, rng: random.Random, csrf: str | None) -> tuple[bytes, str]:
        b = "fuzz-b0undary"
        parts = []
        for name in rng.sample(self.vocabulary, 3) + (["csrf_token"] if csrf else []):
            value = csrf if name == "csrf_token" else rng.choice(FORM_VALUES)
            disposition = f'form-data; name="{name}"'
            if rng.random() < 0.3:
                disposition += '; filename="../../etc/passwd"'
            parts.append(
                f"--{b}\r\nContent-Disposition: {disposition}\r\n\r\n".encode()
                + str(value).encode("utf-8", "surrogatepass")
                + b"\r\n"
            )
        body = b"".join(parts)
        if rng.random() < 0.7:
            body += f"--{b}--\r\n".encode()  # else cut off before the closing boundary
        return body, f"multipart/form-data; boundary={b}"

    def case(self, rng: random.Random, csrf: str | None) -> Case:
        url = self.url(rng, real_ids=rng.random() < 0.4)
        headers: dict[str, str] = {}
        if self.method in ("GET", "DELETE") and rng.random() < 0.7:
            return Case(self.method, url, "no body", headers)
        roll = rng.random()
        if roll < 0.45:
            headers["Content-Type"] = (
                rng.choice(
                    ["application/json", "application/json; charset=latin-1", "application/merge-patch+json"]
                )
                if rng.random() < 0.3
                else "application/json"
            )
            return Case(self.method, url, "json", headers, self.json_body(rng))
        if roll < 0.65:
            headers["Content-Type"] = "application/x-www-form-urlencoded"
            return Case(self.method, url, "form", headers, self.form_body(rng, csrf))
        if roll < 0.75:
            body, ctype = self.multipart_body(rng, csrf)
            headers["Content-Type"] = ctype
            return Case(self.method, url, "multipart", headers, body)
        if roll < 0.85:
            ctype = rng.choice(CONTENT_TYPES)
            if ctype:
                headers["Content-Type"] = ctype
            return Case(self.method, url, "empty", headers, b"")
        ctype = rng.choice(CONTENT_TYPES)
        if ctype:
            headers["Content-Type"] = ctype
        body = b'{"note": "' + b"x" * (BODY_LIMIT + 100) + b'"}'
        return Case(self.method, url, "oversized", headers, body, chunked=rng.random() < 0.5)


@dataclass
class Caller:
    name: str
    client: TestClient
    headers: dict[str, str]
    csrf: str | None = None
    keep_cookies: bool = False


@pytest.fixture
def fuzz_app(fresh_settings: Settings) -> Iterator[tuple[FastAPI, TestClient]]:
    """The app over a committed database of its own: each request gets its own session, as in service."""
    settings = fresh_settings.model_copy(update={"max_body_bytes": BODY_LIMIT})
    app = create_app(settings)
    with TestClient(app, raise_server_exceptions=False) as client:
        yield app, client


@pytest.fixture
def world_and_callers(fuzz_app: tuple[FastAPI, TestClient]) -> Iterator[tuple[dict[str, str], list[Caller]]]:
    """Real objects (so some cases reach past the lookups) and a credential of every kind."""
    app, client = fuzz_app
    settings: Settings = app.state.settings
    now = dt.datetime.now(dt.UTC)
    tokens: dict[str, str] = {}
    with committed_session(settings) as s:
        trial = factories.make_trial(s)
        dev, _ = factories.make_device(s, trial)
        home = factories.make_home(s, trial)
        inst = factories.make_installation(s, dev, home, installed_at=now - dt.timedelta(days=5))
        alert = factories.make_alert(
            s, app.state.clip_store, settings, dev, detected_at=now - dt.timedelta(hours=1)
        )
        bystander, _ = factories.make_user(s, role="lead")  # the only account whose id is offered
        _, device_token = factories.make_device(s, trial)
        for role in ROLES:
            user, _ = factories.make_user(s, role=role, is_adjudicator=role == "reviewer")
            _, tokens[role] = auth_service.create_api_token(s, user, "fuzz")
        admin, password = factories.make_user(s, role="admin")
        world = {
            "serial": dev.serial,
            "alert_id": str(alert.id),
            "code": home.code,
            "installation_id": str(inst.id),
            "home_id": str(home.id),
            "device_id": str(dev.id),
            "user_id": str(bystander.id),
            "trial": trial.code,
            "kind": "spectrogram",
            "name": "rates",
        }
        email = admin.email
    callers = [
        Caller("anonymous", client, {}),
        Caller("device", client, {"Authorization": f"Bearer {device_token}"}),
    ]
    callers += [
        Caller(f"token:{role}", client, {"Authorization": f"Bearer {token}"})
        for role, token in tokens.items()
    ]
    with TestClient(app, raise_server_exceptions=False) as browser:
        sign_in(browser, email, password)
        csrf = csrf_of(browser)
        callers.append(Caller("cookie:admin", browser, {"X-CSRF-Token": csrf}, csrf=csrf, keep_cookies=True))
        yield world, callers


def send(caller: Caller, case: Case) -> Any:
    if not caller.keep_cookies:
        caller.client.cookies.clear()
    content: Any = case.content
    if case.chunked and content:
        data = content
        content = (data[i : i + 8192] for i in range(0, len(data), 8192))
    return caller.client.request(
        case.method,
        case.url,
        headers={**caller.headers, **case.headers},
        content=content,
        follow_redirects=False,
    )


def check(r: Any, who: str, case: Case) -> str | None:
    if r.status_code >= 500:
        return f"{who} {case.label()}: {r.status_code} {r.text[:200]!r}"
    if 400 <= r.status_code < 500 and r.headers.get("content-type", "").startswith("application/json"):
        try:
            err = r.json()["error"]
            ok = isinstance(err["code"], str) and isinstance(err["message"], str) and err["message"]
        except (ValueError, KeyError, TypeError):
            ok = False
        if not ok:
            return f"{who} {case.label()}: {r.status_code} without the error envelope: {r.text[:200]!r}"
    return None


# Routes that end the caller's own session run last, so the rest of the walk keeps its credentials.
_LAST = {("POST", "/logout"), ("POST", "/account/password")}


def cases_per_caller(caller: str, full: bool) -> int:
    if caller in ("anonymous", "device"):
        n = 3
    elif caller in ("token:admin", "cookie:admin"):
        n = 10
    else:
        n = 5
    return n if full else max(1, n // 2)


@dataclass
class Walk:
    problems: list[str] = field(default_factory=list)
    sent: int = 0
    statuses: dict[int, int] = field(default_factory=dict)


def walk(
    app: FastAPI,
    callers: list[Caller],
    world: dict[str, str],
    *,
    full: bool,
    only: set[tuple[str, str]] | None = None,
) -> Walk:
    """Send every route's seeded cases as every caller; ``full`` False keeps a seeded half."""
    vocabulary = field_names(app)
    routes = sorted(all_routes(app), key=lambda r: ((r[0], r[1]) in _LAST, r[1], r[0]))
    out = Walk()
    for method, path, route, _caps in routes:
        if path.startswith("/docs") or (only is not None and (method, path) not in only):
            continue
        maker = CaseMaker(method, path, route, world, vocabulary)
        for caller in callers:
            rng = random.Random(f"{SEED}|{method}|{path}|{caller.name}")
            if not full and rng.random() > 0.5:
                continue  # PostgreSQL: a seeded half of the (route, caller) pairs
            for i in range(cases_per_caller(caller.name, full)):
                case = maker.case(rng, caller.csrf)
                r = send(caller, case)
                out.sent += 1
                out.statuses[r.status_code] = out.statuses.get(r.status_code, 0) + 1
                problem = check(r, caller.name, case)
                if problem:
                    out.problems.append(f"{problem} (case {i})")
    return out


def test_every_route_survives_hostile_input_from_every_caller(backend, fuzz_app, world_and_callers) -> None:  # type: ignore[no-untyped-def]
    app, client = fuzz_app
    world, callers = world_and_callers
    full = backend.name == "sqlite"
    assert len(all_routes(app)) > 100, "the walk sees the whole app"
    result = walk(app, callers, world, full=full)
    assert not result.problems, f"{len(result.problems)} of {result.sent} requests failed:\n" + "\n".join(
        result.problems[:40]
    )
    # The walk got past the guards, not only 401s: successes and validation refusals both happened.
    assert result.sent > (4000 if full else 800), result.sent
    assert sum(n for s, n in result.statuses.items() if s < 400) > (300 if full else 100), result.statuses
    assert result.statuses.get(422, 0) > (200 if full else 50), result.statuses
    assert result.statuses.get(413, 0) > (50 if full else 10), result.statuses
    client.cookies.clear()
    r = client.get("/api/v1/health")
    assert r.status_code == 200, r.text


def test_the_walk_reports_a_route_that_fails_on_hostile_input(fuzz_app, world_and_callers) -> None:  # type: ignore[no-untyped-def]
    """A route that breaks on a big number or a bad envelope is caught, so the walk above can fail."""
    app, _ = fuzz_app
    world, callers = world_and_callers

    def fragile(n: str) -> dict[str, str]:
        if len(n) > 18:
            raise RuntimeError("overflow")  # the 500 the walk must see
        return {"n": n}

    async def no_envelope() -> JSONResponse:
        return JSONResponse({"detail": "bare"}, status_code=409)

    app.add_api_route("/api/v1/fragile/{n}", fragile, methods=["GET"])
    app.add_api_route("/api/v1/unwrapped", no_envelope, methods=["POST"])
    result = walk(
        app, callers, world, full=True, only={("GET", "/api/v1/fragile/{n}"), ("POST", "/api/v1/unwrapped")}
    )
    assert any(": 500 " in p and "/api/v1/fragile/" in p for p in result.problems), result.problems
    assert any("without the error envelope" in p and "/api/v1/unwrapped" in p for p in result.problems)


@pytest.fixture
def routes_only(tmp_path) -> FastAPI:  # type: ignore[no-untyped-def]
    """The app for its routes only (it is never started, so no database is touched)."""
    return create_app(Settings(data_dir=tmp_path, secret_key="fuzz-routes-" + "r" * 32))


def test_field_vocabulary_covers_page_forms_and_body_models(routes_only: FastAPI) -> None:
    """The fuzz reaches real fields: page form names from the templates and body model fields."""
    app = routes_only
    vocabulary = field_names(app)
    for name in ("email", "password", "label", "note", "code"):
        assert name in vocabulary, name
    models = {m.__name__ for _, _, route, _ in all_routes(app) for m in body_models(route)}
    assert {"HomeIn", "VerdictIn", "DeviceIn"} <= models, models


def test_case_maker_is_reproducible(routes_only: FastAPI) -> None:
    app = routes_only
    _m, path, route, _ = next(r for r in all_routes(app) if r[1] == "/api/v1/homes" and r[0] == "POST")
    world = {"code": "H-1"}
    vocabulary = ["note", "code", "email", "label", "trial", "week", "at"]
    a = CaseMaker("POST", path, route, world, vocabulary)
    b = CaseMaker("POST", path, route, world, vocabulary)
    ra, rb = random.Random("same"), random.Random("same")
    for _ in range(20):
        ca, cb = a.case(ra, "t"), b.case(rb, "t")
        assert (ca.url, ca.kind, ca.content) == (cb.url, cb.kind, cb.content)
