"""Register pages: the home list, a new home, import/export and the attribute catalogue. Thin
routes over households.service; one home's pages are in home_pages, its installations' in
installation_pages.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Request
from starlette.datastructures import FormData, UploadFile
from starlette.responses import Response

from server.auth.models import User
from server.db import begin_write
from server.deps import DbSession, require
from server.errors import AppError, ValidationFailed
from server.households import catalogue, forms, service, transfer, views
from server.households.models import HomeState
from server.roles import allowed
from server.trials import service as trials_service

router = APIRouter(include_in_schema=False)


def _traits(row_attrs: dict[str, Any], specs: list[Any]) -> list[str]:
    """A short reading of a home's answers: yes attributes by label, options and numbers with labels."""
    out = []
    for s in specs:
        v = row_attrs.get(s.key)
        if v is True:
            out.append(s.label.lower() if s.label[:1].isupper() and not s.label[1:2].isupper() else s.label)
        elif s.kind == "one_of" and v:
            out.append(str(v))
        elif s.kind == "whole_number" and v is not None:
            out.append(f"{s.label.lower()}: {v}")
    return out


# --- register list ------------------------------------------------------------------------------


@router.get("/homes")
def register_page(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    state: str | None = None,
    attribute: str | None = None,
    value: str | None = None,
    sort: str = "code",
    desc: bool = False,
    user: User = Depends(require("homes.view")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    specs = catalogue.list_catalogue(session, t)
    error = None
    parsed = None
    spec = next((s for s in specs if s.key == attribute), None) if attribute else None
    if attribute and spec is None:
        error, attribute = f"'{attribute}' is not an attribute of this trial.", None
    elif spec is not None:
        try:
            parsed = catalogue.parse_value(spec, value)
        except ValueError as exc:
            error, attribute = str(exc), None
    if state and state not in HomeState.all:
        error, state = f"'{state}' is not a home state.", None
    if sort not in service.SORTS:
        sort = "code"
    homes = service.list_homes(
        session, t, state=state or None, attribute=attribute, value=parsed, sort=sort, descending=desc
    )
    rows = views.register_rows(session, homes)
    return forms.page(
        request,
        user,
        "households/list.html",
        {
            "trial": t,
            "trials": trials_service.list_trials(session),
            "rows": rows,
            "counts": service.state_counts(session, t),
            "total": service.home_count(session, t),
            "specs": specs,
            "traits": {r.code: _traits(r.attributes, specs) for r in rows},
            "filters": {
                "state": state or "",
                "attribute": attribute or "",
                "value": value or "",
                "sort": sort,
                "desc": desc,
            },
            "sorts": service.SORTS,
            "error": error,
        },
    )


# --- new home -----------------------------------------------------------------------------------


@router.get("/homes/new")
def new_home_form(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("homes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return forms.page(
        request,
        user,
        "households/new.html",
        {
            "trial": t,
            "trials": trials_service.list_trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "values": {},
            "contact": {},
            "errors": {},
            "note": "",
        },
    )


@router.post("/homes/new")
def new_home_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, forms.text(form, "trial") or None)
    specs = catalogue.list_catalogue(session, t)
    values = forms.attribute_values(form, specs)
    contact = {f: forms.text(form, f) for f in service.CONTACT_FIELDS}
    note = forms.text(form, "note")
    errors: dict[str, str] = {}
    # Check both parts first, so every message shows at once beside its field.
    _, attr_errors = catalogue.validate_attributes(specs, values)
    errors.update(attr_errors)
    if any(contact.values()):
        if not allowed(user.role, "personal.manage"):
            errors["names"] = "Your role may not record contact details."
        else:
            try:
                service.check_contact(contact)
            except ValidationFailed as exc:
                errors.update(exc.errors)
    if not errors:
        try:
            home = service.create_home(
                session, t, attributes=values, actor=user, note=note, at=forms.now(request)
            )
            if any(contact.values()):
                service.set_contact(session, home, actor=user, **contact)
        except ValidationFailed as exc:
            errors.update(exc.errors or {"note": exc.message})
    if errors:
        return forms.page(
            request,
            user,
            "households/new.html",
            {
                "trial": t,
                "trials": trials_service.list_trials(session),
                "specs": specs,
                "values": values,
                "contact": contact,
                "errors": errors,
                "note": note,
            },
            status_code=422,
        )
    session.commit()
    forms.flash(request, f"{home.code} added to the register as a candidate.")
    return forms.go(f"/homes/{home.code}")


# --- import / export ----------------------------------------------------------------------------


@router.get("/homes/import")
def import_form(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("homes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return forms.page(
        request,
        user,
        "households/import.html",
        {
            "trial": t,
            "trials": trials_service.list_trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "report": None,
            "rejected": None,
            "contact_fields": service.CONTACT_FIELDS,
        },
    )


@router.post("/homes/import")
async def import_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    upload = form.get("file")
    data = await upload.read(transfer.MAX_IMPORT_BYTES + 1) if isinstance(upload, UploadFile) else b""
    trial_code = forms.text(form, "trial") or None

    def work() -> Response:
        t = trials_service.trial_in_view(session, trial_code)
        ctx = {
            "trial": t,
            "trials": trials_service.list_trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "report": None,
            "rejected": None,
            "contact_fields": service.CONTACT_FIELDS,
        }
        try:
            report = transfer.import_csv(session, t, data, actor=user)
        except transfer.ImportRejected as exc:
            ctx["rejected"] = exc
            return forms.page(request, user, "households/import.html", ctx, status_code=422)
        session.commit()
        ctx["report"] = report
        return forms.page(request, user, "households/import.html", ctx)

    from starlette.concurrency import run_in_threadpool

    return await run_in_threadpool(work)


def _csv_response(text: str, filename: str) -> Response:
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="{filename}"', "Cache-Control": "no-store"},
    )


@router.get("/homes/export.csv")
def export_page(
    session: DbSession, trial: str | None = None, user: User = Depends(require("homes.view"))
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return _csv_response(transfer.export_csv(session, t, actor=user), f"register-{t.code}.csv")


@router.get("/homes/export-personal.csv")
def export_personal_page(
    session: DbSession, trial: str | None = None, user: User = Depends(require("personal.view"))
) -> Response:
    begin_write(session)  # the view writes an audit row
    t = trials_service.trial_in_view(session, trial)
    text = transfer.export_csv(session, t, with_personal_data=True, actor=user)
    session.commit()
    return _csv_response(text, f"register-{t.code}-personal.csv")


# --- the attribute catalogue --------------------------------------------------------------------


@router.get("/homes/attributes")
def attributes_page(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("homes.view")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return forms.page(
        request,
        user,
        "households/attributes.html",
        {
            "trial": t,
            "trials": trials_service.list_trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "errors": {},
            "values": {},
            "kinds": catalogue.KIND_LABELS,
        },
    )


@router.post("/homes/attributes")
def attributes_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("attributes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, forms.text(form, "trial") or None)
    values = {k: forms.text(form, k) for k in ("key", "label", "kind", "options", "min_value", "max_value")}
    try:
        catalogue.add_attribute(
            session,
            t,
            key=values["key"],
            label=values["label"],
            kind=values["kind"],
            options=values["options"].split(","),
            min_value=forms.whole_number(values["min_value"], "min_value"),
            max_value=forms.whole_number(values["max_value"], "max_value"),
            actor=user,
        )
    except (ValidationFailed, AppError) as exc:
        errors = exc.errors if isinstance(exc, ValidationFailed) and exc.errors else {"key": exc.message}
        return forms.page(
            request,
            user,
            "households/attributes.html",
            {
                "trial": t,
                "trials": trials_service.list_trials(session),
                "specs": catalogue.list_catalogue(session, t),
                "errors": errors,
                "values": values,
                "kinds": catalogue.KIND_LABELS,
            },
            status_code=422,
        )
    session.commit()
    forms.flash(request, f"Attribute '{values['label']}' added to trial {t.code}.")
    return forms.go(f"/homes/attributes?trial={t.code}")
