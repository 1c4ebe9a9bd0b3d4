"""The audit trail across channels and keys (admin only)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query

from ...actions import audit
from ...channel_config import Plain
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS
from ..schemas.events import AuditPage
from .channels import Limit

router = APIRouter(prefix="/v1/audit", tags=["audit"], responses=COMMON_ERRORS)


@router.get("", summary="Every change and event, with the key that made it (never a secret)")
def list_audit(ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None,
               kind: Annotated[Plain | None, Query(max_length=32)] = None,
               key_id: Annotated[Plain | None, Query(max_length=40)] = None) -> AuditPage:
    who.require("admin")
    with ctx.work.unit(write=False) as unit:
        page = audit.list_(unit.repo, kind=kind, key_id=key_id, cursor=cursor, limit=limit)
    return AuditPage.model_validate(page, from_attributes=True)
