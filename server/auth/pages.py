"""Sign-in, sign-out, and the account page (personal API tokens)."""

from __future__ import annotations

import hmac

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse
from starlette.responses import Response

from server.auth import service
from server.auth.models import User
from server.deps import DbSession, csrf_token, require
from server.web.templating import render

router = APIRouter(include_in_schema=False)

HOME_BY_ROLE = {"admin": "/devices", "coordinator": "/homes", "reviewer": "/review", "lead": "/summary"}


def _safe_next(value: str | None, user: User) -> str:
    if value and value.startswith("/") and not value.startswith("//") and not value.startswith("/login"):
        return value
    return HOME_BY_ROLE.get(user.role, "/devices")


@router.get("/login")
def login_form(request: Request, next: str | None = None) -> Response:
    return render(request, "auth/login.html", {"next": next or "", "error": None, "email": ""})


@router.post("/login")
def login(request: Request, session: DbSession, email: str = Form(""), password: str = Form(""),
          csrf_token_: str = Form("", alias="csrf_token"), next: str = Form("")) -> Response:
    expected = request.session.get("csrf")
    if not expected or not hmac.compare_digest(str(expected), csrf_token_):
        return render(request, "auth/login.html",
                      {"next": next, "email": email,
                       "error": "The sign-in form had expired; please try again."}, status_code=403)
    user = service.authenticate(session, email, password)
    if user is None:
        session.rollback()
        return render(request, "auth/login.html",
                      {"next": next, "email": email, "error": "E-mail or password is not right."},
                      status_code=401)
    session.commit()
    request.session.clear()
    request.session["uid"] = user.id
    csrf_token(request)  # a fresh token for the new session
    return RedirectResponse(_safe_next(next, user), status_code=303)


@router.post("/logout")
def logout(request: Request, user: User = Depends(require("staff.self"))) -> Response:
    request.session.clear()
    return RedirectResponse("/login", status_code=303)


@router.get("/account")
def account(request: Request, session: DbSession, user: User = Depends(require("staff.self"))) -> Response:
    return render(request, "auth/account.html", {"new_token": None})


@router.post("/account/tokens")
def create_token(request: Request, session: DbSession, label: str = Form("api"),
                 user: User = Depends(require("staff.self"))) -> Response:
    _, token = service.create_api_token(session, user, label)
    session.commit()
    return render(request, "auth/account.html", {"new_token": token}, status_code=201)
