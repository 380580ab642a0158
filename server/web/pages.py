"""The front page: sends each signed-in role to its main page."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import RedirectResponse
from starlette.responses import Response

from server.auth.pages import HOME_BY_ROLE
from server.deps import DbSession, current_staff

router = APIRouter(include_in_schema=False)


@router.get("/")
def front(request: Request, session: DbSession) -> Response:
    user = current_staff(request, session)
    if user is None:
        return RedirectResponse("/login", status_code=303)
    return RedirectResponse(HOME_BY_ROLE.get(user.role, "/devices"), status_code=303)
