"""Webhooks (admin only): make, list, delete, test-send; deliveries and re-sending."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path, Query

from ...actions import webhooks
from ...channel_config import Plain
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.webhooks import DeliveryPage, DeliveryPublic, WebhookCreate, WebhookCreated, WebhookPage, WebhookPublic
from .channels import Limit

router = APIRouter(prefix="/v1/webhooks", tags=["webhooks"], responses={**COMMON_ERRORS, **error_responses(404)})
Wid = Annotated[Plain, Path(max_length=40)]
Did = Annotated[int, Path(ge=1, le=2**62)]


@router.post("", status_code=201, summary="Create a webhook (the secret is shown once)")
def create_webhook(body: WebhookCreate, ctx: Ctx, who: Who) -> WebhookCreated:
    who.require("admin")
    with ctx.work.unit(write=True) as unit:
        out = webhooks.create(unit.repo, url=body.url, events=body.events, secret=body.secret,
                              allow_link_local=ctx.settings.webhook_allow_link_local)
    return WebhookCreated.model_validate(out)


@router.get("", summary="List webhooks (never their secrets)")
def list_webhooks(ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None) -> WebhookPage:
    who.require("admin")
    with ctx.work.unit(write=False) as unit:
        page = webhooks.list_(unit.repo, cursor=cursor, limit=limit)
    return WebhookPage.model_validate(page, from_attributes=True)


@router.delete("/{wid}", summary="Delete a webhook and its deliveries")
def delete_webhook(wid: Wid, ctx: Ctx, who: Who) -> WebhookPublic:
    who.require("admin")
    with ctx.work.unit(write=True) as unit:
        out = webhooks.delete(unit.repo, wid)
    return WebhookPublic.model_validate(out)


@router.post("/{wid}/test", status_code=202, summary="Queue a test delivery (event kind webhook_test)")
def test_webhook(wid: Wid, ctx: Ctx, who: Who) -> DeliveryPublic:
    who.require("admin")
    with ctx.work.unit(write=True) as unit:
        out = webhooks.test_send(unit.repo, wid, unit.now())
    return DeliveryPublic.model_validate(out)


@router.get("/{wid}/deliveries", summary="A webhook's deliveries (state=dead: the dead letters)")
def list_deliveries(wid: Wid, ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None,
                    state: Annotated[str | None, Query(max_length=16)] = None) -> DeliveryPage:
    who.require("admin")
    with ctx.work.unit(write=False) as unit:
        page = webhooks.deliveries(unit.repo, wid, state=state, cursor=cursor, limit=limit)
    return DeliveryPage.model_validate(page, from_attributes=True)


@router.post("/{wid}/deliveries/{did}/resend", status_code=202, summary="Send a delivery again from its first attempt")
def resend_delivery(wid: Wid, did: Did, ctx: Ctx, who: Who) -> DeliveryPublic:
    who.require("admin")
    with ctx.work.unit(write=True) as unit:
        out = webhooks.resend(unit.repo, wid, did, unit.now())
    return DeliveryPublic.model_validate(out)
