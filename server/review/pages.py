"""Review pages: the listening desk, adjudication, gold checks, agreement, and the clip images.

Claims are taken only on POST (the desk's "start" form, a verdict, or the claims API), so a
reload never changes which clip a reviewer holds.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Form, Query, Request
from fastapi.responses import FileResponse, JSONResponse, RedirectResponse
from starlette.responses import Response

from server.auth.models import User
from server.deps import ClipStoreDep, DbSession, SettingsDep, require
from server.devices import views as device_views
from server.devices.models import Alert
from server.errors import Conflict, NotFound, ValidationFailed
from server.review import image_cache, overview, queue, service
from server.review.api import prefetch, review_key
from server.review.images import ImageMeta
from server.review.schemas import QueueItemOut
from server.trials import service as trials_service
from server.web.templating import render

router = APIRouter(include_in_schema=False)

LABEL_CHOICES = [
    ("confirmed", "Confirmed", "the claimed sound is there", "c"),
    ("false_alarm", "False alarm", "something else set it off", "f"),
    ("unsure", "Unsure", "ask a second reviewer", "u"),
    ("unusable", "Unusable", "no audio, or corrupt", "x"),
]
RESEMBLANCE_CHOICES = [
    ("resembles", "Resembles the target", "a forgivable error", "s"),
    ("unrelated", "Unrelated", "an unforgivable error", "d"),
]
FILTER_KEY = "review_filter"


def _filter(request: Request) -> dict[str, str | None]:
    raw = request.session.get(FILTER_KEY) or {}
    return {"trial": raw.get("trial") or None, "sound_class": raw.get("sound_class") or None}


def _filter_ids(session: Any, flt: dict[str, str | None]) -> tuple[int | None, str | None]:
    trial_id = None
    if flt["trial"]:
        trial = trials_service.find_trial(session, flt["trial"])
        trial_id = trial.id if trial is not None else -1
    return trial_id, flt["sound_class"]


def _choices(session: Any) -> tuple[list[Any], list[str]]:
    trials = trials_service.list_trials(session)
    classes = sorted({c for t in trials for c in (t.sound_classes or [])})
    return trials, classes


def _axis(meta: ImageMeta) -> dict[str, Any]:
    return {
        "x": [(t, 100 * t / meta.duration_s) for t in meta.time_ticks_s] if meta.duration_s else [],
        "y": [(f, 100 * meta.y_fraction(f)) for f in meta.freq_ticks_khz],
        "spec_width_pct": 100 * meta.time_extent_s[1] / meta.duration_s if meta.duration_s else 100,
    }


def _item_payload(request: Request, session: Any, item: queue.QueueItem) -> tuple[dict[str, Any], Any]:
    settings = request.app.state.settings
    store = request.app.state.clip_store
    alert = session.get(Alert, item.alert_id)
    assert alert is not None
    meta = image_cache.ensure_clip(settings.cache_dir, store, alert.clip)
    payload = QueueItemOut.of(item).model_dump(mode="json")
    payload["meta"] = meta.to_json()
    payload["detected_local_text"] = item.detected_local.strftime("%a %d %b %Y, %H:%M:%S")
    return payload, meta


def _desk_context(
    request: Request,
    session: Any,
    user: User,
    item: queue.QueueItem,
    *,
    errors: dict[str, str] | None = None,
    form: dict[str, Any] | None = None,
) -> dict[str, Any]:
    payload, meta = _item_payload(request, session, item)
    return {
        "item": item,
        "meta": meta,
        "axis": _axis(meta),
        "labels": LABEL_CHOICES,
        "resemblances": RESEMBLANCE_CHOICES,
        "errors": errors or {},
        "form": form or {},
        "data": {"mode": "desk", "current": payload, "filter": _filter(request)},
        "can_adjudicate": service.can_adjudicate(user),
    }


# --- the desk ---------------------------------------------------------------------------------


@router.get("/review")
def desk_home(
    request: Request, session: DbSession, empty: int = Query(0), user: User = Depends(require("review.work"))
) -> Response:
    flt = _filter(request)
    trial_id, sound_class = _filter_ids(session, flt)
    trials, classes = _choices(session)
    return render(
        request,
        "review/home.html",
        {
            "filter": flt,
            "trials": trials,
            "sound_classes": classes,
            "empty": bool(empty),
            "waiting": queue.queue_size(session, reviewer=user, trial_id=trial_id, sound_class=sound_class),
            "can_adjudicate": service.can_adjudicate(user),
        },
    )


def _go_next(request: Request, session: Any, user: User, settings: Any) -> Response:
    trial_id, sound_class = _filter_ids(session, _filter(request))
    view = service.claim_next(
        session,
        reviewer=user,
        trial_id=trial_id,
        sound_class=sound_class,
        claim_minutes=settings.claim_minutes,
        key=review_key(request, settings),
    )
    session.commit()
    prefetch(request, view)
    if view.current is None:
        return RedirectResponse("/review?empty=1", status_code=303)
    return RedirectResponse(f"/review/{view.current.alert_id}", status_code=303)


@router.post("/review/next")
def desk_start(
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    trial: str = Form(""),
    sound_class: str = Form(""),
    user: User = Depends(require("review.work")),
) -> Response:
    request.session[FILTER_KEY] = {"trial": trial.strip() or None, "sound_class": sound_class.strip() or None}
    return _go_next(request, session, user, settings)


# --- adjudication ---------------------------------------------------------------------------------


@router.get("/review/adjudication")
def adjudication_list(
    request: Request,
    session: DbSession,
    trial: str | None = Query(None, max_length=40),
    user: User = Depends(require("review.adjudicate")),
) -> Response:
    trial_id = None
    if trial:
        t = trials_service.find_trial(session, trial)
        trial_id = t.id if t else -1
    cases = service.list_adjudications(session, adjudicator=user, trial_id=trial_id)
    return render(request, "review/adjudication_list.html", {"cases": cases, "trial": trial})


def _adjudication_ctx(
    request: Request,
    session: Any,
    user: User,
    alert_id: int,
    errors: dict[str, str] | None = None,
    form: dict[str, Any] | None = None,
) -> dict[str, Any]:
    case = service.get_adjudication(session, adjudicator=user, alert_id=alert_id)
    ctx = _desk_context(request, session, user, case.item, errors=errors, form=form)
    ctx["case"] = case
    ctx["data"]["mode"] = "adjudicate"
    # Here "unsure" ends the matter undecided rather than asking anyone else.
    ctx["labels"] = [(v, n, "no one can tell" if v == "unsure" else h, k) for v, n, h, k in LABEL_CHOICES]
    ctx["label_names"] = {k: n for k, n, _, _ in LABEL_CHOICES}
    ctx["cause_names"] = {c.code: c.label for c in case.item.causes}
    return ctx


@router.get("/review/adjudication/{alert_id}")
def adjudication_page(
    alert_id: int, request: Request, session: DbSession, user: User = Depends(require("review.adjudicate"))
) -> Response:
    return render(request, "review/adjudicate.html", _adjudication_ctx(request, session, user, alert_id))


def _verdict_form(label: str, cause: str, resemblance: str, note: str, private: str) -> dict[str, Any]:
    out: dict[str, Any] = {
        "label": label,
        "cause": cause.strip() or None,
        "resemblance": resemblance.strip() or None,
        "note": note,
        "private": private not in ("", "0", "false"),
    }
    if label != "false_alarm":  # the radio groups may stay filled in when the label changes
        out["cause"] = out["resemblance"] = None
    return out


@router.post("/review/adjudication/{alert_id}")
def adjudication_submit(
    alert_id: int,
    request: Request,
    session: DbSession,
    label: str = Form(""),
    cause: str = Form(""),
    resemblance: str = Form(""),
    note: str = Form(""),
    user: User = Depends(require("review.adjudicate")),
) -> Response:
    form = _verdict_form(label, cause, resemblance, note, "")
    try:
        service.adjudicate(
            session,
            adjudicator=user,
            alert_id=alert_id,
            label=form["label"],
            cause=form["cause"],
            resemblance=form["resemblance"],
            note=form["note"],
        )
    except ValidationFailed as exc:
        session.rollback()
        return render(
            request,
            "review/adjudicate.html",
            _adjudication_ctx(request, session, user, alert_id, exc.errors, form),
            status_code=422,
        )
    session.commit()
    return RedirectResponse("/review/adjudication", status_code=303)


# --- gold checks ---------------------------------------------------------------------------------


@router.get("/review/gold")
def gold_page(request: Request, session: DbSession, user: User = Depends(require("review.gold"))) -> Response:
    return render(request, "review/gold.html", _gold_ctx(session))


def _gold_ctx(
    session: Any, errors: dict[str, str] | None = None, form: dict[str, Any] | None = None
) -> dict[str, Any]:
    # Every trial's causes, once each; marking a clip checks the cause against its own trial.
    causes: dict[str, str] = {}
    for t in trials_service.list_trials(session):
        for c in queue.trial_causes(t):
            causes.setdefault(c.code, c.label)
    return {
        "rows": service.list_gold_checks(session),
        "labels": LABEL_CHOICES,
        "errors": errors or {},
        "form": form or {},
        "causes": [{"code": k, "label": v} for k, v in causes.items()],
    }


@router.post("/review/gold")
def gold_create(
    request: Request,
    session: DbSession,
    alert_id: str = Form(""),
    expected_label: str = Form(""),
    expected_cause: str = Form(""),
    user: User = Depends(require("review.gold")),
) -> Response:
    alert_id = alert_id.strip()
    cause = expected_cause.strip() or None
    form = {"alert_id": alert_id, "expected_label": expected_label, "expected_cause": cause}
    try:
        if not alert_id.isdigit():
            raise ValidationFailed(
                "Give the alert's number.", {"alert_id": "Give the alert's number."}, field="alert_id"
            )
        service.mark_gold(
            session,
            user=user,
            alert_id=int(alert_id),
            expected_label=expected_label,
            expected_cause=cause,
        )
    except ValidationFailed as exc:
        session.rollback()
        return render(request, "review/gold.html", _gold_ctx(session, exc.errors, form), 422)
    except (NotFound, Conflict) as exc:
        session.rollback()
        return render(request, "review/gold.html", _gold_ctx(session, {"alert_id": exc.message}, form), 422)
    session.commit()
    return RedirectResponse("/review/gold", status_code=303)


# --- agreement -----------------------------------------------------------------------------------


@router.get("/review/agreement")
def agreement_page(
    request: Request,
    session: DbSession,
    trial: str | None = Query(None, max_length=40),
    user: User = Depends(require("review.agreement")),
) -> Response:
    trial_id = None
    chosen = None
    if trial:
        chosen = trials_service.find_trial(session, trial)
        if chosen is None:
            raise NotFound(f"No trial has code {trial}.", code="unknown_trial")
        trial_id = chosen.id
    ov = overview.review_overview(session, trial_id)
    return render(
        request,
        "review/agreement.html",
        {
            "ov": ov,
            "trials": trials_service.list_trials(session),
            "trial": chosen,
            "label_names": {k: n for k, n, _, _ in LABEL_CHOICES},
        },
    )


# --- images ----------------------------------------------------------------------------------------


def _images_for(alert_id: int, request: Request, session: Any, store: Any, user: User) -> ImageMeta:
    # Same refusals as the audio itself: erased, private content, no consent to listen.
    device_views.clip_file_for(session, store, user, alert_id)
    alert = session.get(Alert, alert_id)
    assert alert is not None
    return image_cache.ensure_clip(request.app.state.settings.cache_dir, store, alert.clip)


IMAGE_CACHE = {"Cache-Control": "private, max-age=3600"}


@router.get("/review/images/{alert_id}/meta.json")
def image_meta(
    alert_id: int,
    request: Request,
    session: DbSession,
    store: ClipStoreDep,
    user: User = Depends(require("clips.listen")),
) -> JSONResponse:
    meta = _images_for(alert_id, request, session, store, user)
    return JSONResponse(meta.to_json(), headers=IMAGE_CACHE)


@router.get("/review/images/{alert_id}/{kind}.png")
def image_png(
    alert_id: int,
    kind: str,
    request: Request,
    session: DbSession,
    store: ClipStoreDep,
    user: User = Depends(require("clips.listen")),
) -> FileResponse:
    if kind not in image_cache.KINDS:
        raise NotFound(f"There is no '{kind}' image; use waveform or spectrogram.")
    _images_for(alert_id, request, session, store, user)
    alert = session.get(Alert, alert_id)
    assert alert is not None
    path = image_cache.path_for(request.app.state.settings.cache_dir, alert.clip.sha256, kind)
    return FileResponse(path, media_type="image/png", headers=IMAGE_CACHE)


# --- one clip on the desk (after the fixed paths above) -----------------------------------------


@router.get("/review/{alert_id}")
def desk_clip(
    alert_id: int, request: Request, session: DbSession, user: User = Depends(require("review.work"))
) -> Response:
    try:
        item = queue.get_review_item(session, reviewer=user, alert_id=alert_id)
    except (queue.NotInReview, queue.ClaimLost):
        return RedirectResponse("/review", status_code=303)
    return render(request, "review/desk.html", _desk_context(request, session, user, item))


@router.post("/review/{alert_id}")
def desk_submit(
    alert_id: int,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    label: str = Form(""),
    cause: str = Form(""),
    resemblance: str = Form(""),
    note: str = Form(""),
    private: str = Form(""),
    user: User = Depends(require("review.work")),
) -> Response:
    form = _verdict_form(label, cause, resemblance, note, private)
    try:
        service.record_verdict(
            session,
            reviewer=user,
            alert_id=alert_id,
            label=form["label"],
            cause=form["cause"],
            resemblance=form["resemblance"],
            note=form["note"],
            private=form["private"],
            key=review_key(request, settings),
        )
    except ValidationFailed as exc:
        session.rollback()
        item = queue.get_review_item(session, reviewer=user, alert_id=alert_id)
        return render(
            request,
            "review/desk.html",
            _desk_context(request, session, user, item, errors=exc.errors, form=form),
            status_code=422,
        )
    return _go_next(request, session, user, settings)
