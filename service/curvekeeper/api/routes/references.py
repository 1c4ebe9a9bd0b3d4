"""Reference instruments: create, list, read, change or retire."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Path, Query

from ...actions import references
from ...channel_config import CHANNEL_ID_PATTERN
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.references import ReferenceCreate, ReferencePage, ReferencePublic, ReferenceUpdate
from .channels import Limit

router = APIRouter(prefix="/v1/references", tags=["references"],
                   responses={**COMMON_ERRORS, **error_responses(404, 409)})

ReferencePath = Annotated[str, Path(min_length=1, max_length=128, pattern=CHANNEL_ID_PATTERN)]
DUE_FILTER = "only references in this due state: ok, due_soon or overdue"


@router.post("", status_code=201, summary="Create a reference instrument", response_model=ReferencePublic)
def create_reference(body: ReferenceCreate, ctx: Ctx, who: Who) -> dict[str, Any]:
    who.require("technician")
    with ctx.work.unit(write=True) as unit:
        return references.create(unit.repo, body.model_dump(), who.key_id, ctx.settings.reference_due_soon_days)


@router.get("", summary="List reference instruments", response_model=ReferencePage)
def list_references(ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None,
                    retired: Annotated[bool | None, Query(description="true: only retired; false: only in use")]
                    = None, due_state: Annotated[str | None, Query(description=DUE_FILTER)] = None
                    ) -> dict[str, Any]:
    with ctx.work.unit(write=False) as unit:
        page = references.list_(unit.repo, retired=retired, due=due_state, cursor=cursor, limit=limit,
                                window_days=ctx.settings.reference_due_soon_days)
    return {"items": page.items, "next_cursor": page.next_cursor}


@router.get("/{reference_id}", summary="A reference instrument", response_model=ReferencePublic)
def get_reference(reference_id: ReferencePath, ctx: Ctx, who: Who) -> dict[str, Any]:
    with ctx.work.unit(write=False) as unit:
        return references.get(unit.repo, reference_id, ctx.settings.reference_due_soon_days)


@router.patch("/{reference_id}", summary="Change a reference instrument, or retire it (retired: true)",
              response_model=ReferencePublic)
def patch_reference(reference_id: ReferencePath, body: ReferenceUpdate, ctx: Ctx, who: Who) -> dict[str, Any]:
    who.require("technician")
    with ctx.work.unit(write=True) as unit:
        return references.patch(unit.repo, reference_id, body.changes(), who.key_id,
                                ctx.settings.reference_due_soon_days)
