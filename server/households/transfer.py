"""The register as CSV: import (validated as a whole, all rows or none) and export.

Import columns: ``code`` (optional; generated when blank), ``state`` (optional: candidate,
screened or declined), ``note``, one column per catalogue attribute (header = attribute key),
and optionally the contact columns ``names, address, phone, email, access_notes``.
Export writes the same columns; contact columns only when asked, and that export is audited.
"""

from __future__ import annotations

import io
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.errors import AppError, ValidationFailed
from server.households import catalogue, service
from server.households.models import Consent, Home, HomeContact, HomeState
from server.trials.models import Trial
from server.web.csvsafe import safe_frame

MAX_IMPORT_BYTES = 5 * 1024 * 1024
BASE_COLUMNS = ("code", "state", "note")
# Written by the export, read back as information only: an import ignores them.
EXPORT_ONLY = (
    "state_changed_at",
    "consent_form_version",
    "consented_on",
    "staff_may_listen",
    "retention_days",
    "erased",
)
IMPORT_STATES = (HomeState.candidate, HomeState.screened, HomeState.declined)


@dataclass(frozen=True)
class RowProblem:
    row: int  # line in the file, the header being line 1; 0 for the file as a whole
    code: str  # the row's home code, if it gave one
    column: str
    problem: str

    def sentence(self) -> str:
        where = "file" if self.row == 0 else f"line {self.row}"
        col = f", column '{self.column}'" if self.column else ""
        code = f" ({self.code})" if self.code else ""
        return f"{where}{code}{col}: {self.problem}"


@dataclass(frozen=True)
class ImportReport:
    rows: int
    created: tuple[str, ...] = ()
    problems: tuple[RowProblem, ...] = field(default=())

    @property
    def ok(self) -> bool:
        return not self.problems


class ImportRejected(AppError):
    """The file was refused as a whole; ``report`` lists each bad row and why."""

    code, status = "import_rejected", 422

    def __init__(self, report: ImportReport) -> None:
        n = len(report.problems)
        super().__init__(
            f"Nothing was imported: {n} problem{'s' if n != 1 else ''} found; "
            f"first: {report.problems[0].sentence()}."
        )
        self.report = report


def _read(data: bytes) -> pd.DataFrame:
    if len(data) > MAX_IMPORT_BYTES:
        raise ValueError(f"the file is larger than {MAX_IMPORT_BYTES // (1024 * 1024)} MiB")
    if not data.strip():
        raise ValueError("the file is empty")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ValueError(f"the file is not UTF-8 text (byte {exc.start})") from exc
    try:
        frame = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False, skipinitialspace=True)
    except pd.errors.EmptyDataError as exc:
        raise ValueError("the file has no header line") from exc
    except pd.errors.ParserError as exc:
        raise ValueError(f"the file is not well-formed CSV ({str(exc).strip()})") from exc
    return frame


def import_csv(session: Session, trial: Trial, data: bytes, *, actor: service.Actor = "cli") -> ImportReport:
    """Check every row, then create all homes, or none. Raises ImportRejected with the report."""
    try:
        frame = _read(data)
    except ValueError as exc:
        raise ImportRejected(ImportReport(0, (), (RowProblem(0, "", "", str(exc)),))) from None
    specs = catalogue.list_catalogue(session, trial)
    by_key = {s.key: s for s in specs}
    columns = [str(c).strip() for c in frame.columns]
    frame.columns = columns
    problems: list[RowProblem] = []
    for col in columns:
        if col not in by_key and col not in (*BASE_COLUMNS, *EXPORT_ONLY, *service.CONTACT_FIELDS):
            problems.append(
                RowProblem(
                    1,
                    "",
                    col,
                    f"unknown attribute '{col}': not in trial {trial.code}'s catalogue nor a register column",
                )
            )
    dupes = {c for c in columns if columns.count(c) > 1}
    for col in sorted(dupes):
        problems.append(RowProblem(1, "", col, "the column appears more than once"))
    has_contact = any(c in service.CONTACT_FIELDS for c in columns)
    existing = set(session.scalars(select(Home.code)))
    seen: dict[str, int] = {}
    plans: list[dict[str, Any]] = []
    if not dupes:
        for i, rec in enumerate(frame.to_dict(orient="records")):
            line = i + 2
            code = str(rec.get("code", "") or "").strip().upper()
            row_problems = []
            if code:
                if not service.CODE_PATTERN.match(code):
                    row_problems.append(RowProblem(line, code, "code", "a code reads H- and 4 to 6 digits"))
                elif code in existing:
                    row_problems.append(
                        RowProblem(line, code, "code", "duplicate code: already in the register")
                    )
                elif code in seen:
                    row_problems.append(
                        RowProblem(line, code, "code", f"duplicate code: also on line {seen[code]}")
                    )
                seen.setdefault(code, line)
            state = str(rec.get("state", "") or "").strip().lower() or HomeState.candidate
            if state not in IMPORT_STATES:
                row_problems.append(
                    RowProblem(
                        line,
                        code,
                        "state",
                        f"bad value '{state}': imported homes start as "
                        f"{', '.join(IMPORT_STATES)}; record consent on the home page",
                    )
                )
            attrs: dict[str, Any] = {}
            for key, spec in by_key.items():
                if key not in rec:
                    continue
                try:
                    v = catalogue.parse_value(spec, rec[key])
                except ValueError as exc:
                    row_problems.append(RowProblem(line, code, key, f"bad value: {exc}"))
                    continue
                if v is not None:
                    attrs[key] = v
            contact = {f: str(rec.get(f, "") or "") for f in service.CONTACT_FIELDS}
            if has_contact:
                try:
                    service.check_contact(contact)
                except ValidationFailed as exc:
                    for f, msg in exc.errors.items():
                        row_problems.append(RowProblem(line, code, f, f"bad value: {msg}"))
            note = str(rec.get("note", "") or "").strip()
            if len(note) > 2000:
                row_problems.append(RowProblem(line, code, "note", "a note is at most 2000 characters"))
            problems.extend(row_problems)
            plans.append(
                {
                    "code": code or None,
                    "state": state,
                    "attributes": attrs,
                    "note": note or None,
                    "contact": contact if has_contact and any(contact.values()) else None,
                }
            )
    if problems:
        raise ImportRejected(ImportReport(len(frame), (), tuple(problems)))
    created = []
    with session.begin_nested():
        for plan in plans:
            home = service.create_home(
                session,
                trial,
                attributes=plan["attributes"],
                code=plan["code"],
                actor=actor,
                note=plan["note"] or "Imported from CSV.",
            )
            if plan["state"] == HomeState.screened:
                service.transition(
                    session, home, HomeState.screened, actor=actor, note="Imported as screened."
                )
            elif plan["state"] == HomeState.declined:
                service.transition(
                    session, home, HomeState.declined, actor=actor, note="Imported as declined."
                )
            if plan["contact"]:
                service.set_contact(session, home, actor=actor, **plan["contact"])
            created.append(home.code)
    audit.record(
        session,
        actor,
        "register.import",
        "trial",
        trial.id,
        {"trial": trial.code, "homes": len(created), "with_personal_data": has_contact},
    )
    return ImportReport(len(frame), tuple(created), ())


def export_csv(
    session: Session, trial: Trial, *, with_personal_data: bool = False, actor: service.Actor = "cli"
) -> str:
    """The trial's register as CSV text; contact columns only with ``with_personal_data`` (audited)."""
    specs = catalogue.list_catalogue(session, trial)
    homes = service.list_homes(session, trial)
    consents: dict[int, Consent] = {}
    for consent in session.scalars(
        select(Consent)
        .join(Home, Home.id == Consent.home_id)
        .where(Home.trial_id == trial.id)
        .order_by(Consent.recorded_at, Consent.id)
    ):
        consents[consent.home_id] = consent
    contacts = {}
    if with_personal_data:
        contacts = {
            c.home_id: c
            for c in session.scalars(
                select(HomeContact)
                .join(Home, Home.id == HomeContact.home_id)
                .where(Home.trial_id == trial.id)
            )
        }
    rows = []
    for h in homes:
        row: dict[str, Any] = {
            "code": h.code,
            "state": h.state,
            "note": "",
            "state_changed_at": h.state_changed_at.isoformat(),
        }
        for s in specs:
            row[s.key] = catalogue.format_value((h.attributes or {}).get(s.key))
        c = consents.get(h.id)
        row["consent_form_version"] = c.form_version if c else ""
        row["consented_on"] = c.consented_on.isoformat() if c else ""
        row["staff_may_listen"] = catalogue.format_value(c.staff_may_listen) if c else ""
        row["retention_days"] = str(c.retention_days) if c else ""
        row["erased"] = "yes" if h.erased_at else "no"
        if with_personal_data:
            p = contacts.get(h.id)
            for f in service.CONTACT_FIELDS:
                row[f] = getattr(p, f) if p else ""
        rows.append(row)
    cols = ["code", "state", "note", *[s.key for s in specs], *EXPORT_ONLY]
    if with_personal_data:
        cols += list(service.CONTACT_FIELDS)
        audit.record(
            session, actor, "personal.export", "trial", trial.id, {"trial": trial.code, "homes": len(rows)}
        )
    # Every text cell is escaped: attribute values and contact details come from people.
    # CRLF line ends (RFC 4180) make the writer quote any cell holding a CR, which would split a row.
    return safe_frame(pd.DataFrame(rows, columns=cols)).to_csv(index=False, lineterminator="\r\n")
