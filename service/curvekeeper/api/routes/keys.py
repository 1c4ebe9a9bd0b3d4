"""API keys (admin only)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path

from ...actions import keys
from ...channel_config import Plain
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.keys import KeyCreate, KeyCreated, KeyPage, KeyPublic
from .channels import Limit

router = APIRouter(prefix="/v1/keys", tags=["keys"], responses={**COMMON_ERRORS, **error_responses(404)})


@router.post("", status_code=201, summary="Create a key (the secret is shown once)")
def create_key(body: KeyCreate, ctx: Ctx, who: Who) -> KeyCreated:
    who.require("admin")
    with ctx.work.unit(write=True) as unit:
        out = keys.create(unit.repo, role=body.role, prefixes=body.prefixes, label=body.label, key_id=who.key_id)
    return KeyCreated.model_validate(out)


@router.get("", summary="List keys (never their secrets)")
def list_keys(ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None) -> KeyPage:
    who.require("admin")
    with ctx.work.unit(write=False) as unit:
        page = keys.list_(unit.repo, cursor=cursor, limit=limit)
    return KeyPage.model_validate(page, from_attributes=True)


@router.delete("/{kid}", summary="Revoke a key")
def revoke_key(kid: Annotated[Plain, Path(max_length=40)], ctx: Ctx, who: Who) -> KeyPublic:
    who.require("admin")
    with ctx.work.unit(write=True) as unit:
        out = keys.revoke(unit.repo, kid, who.key_id)
    ctx.keys.clear()
    return KeyPublic.model_validate(out)
