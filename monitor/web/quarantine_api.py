"""Read-only view of the quarantine: ``GET /api/quarantine`` and ``/api/quarantine/{id}``.

For a signed-in user (API token or board session). Listing never carries payloads;
one item does (it may identify a patient: the response is ``no-store`` like every API
answer). Re-processing and purging stay on the command line (``gasgap quarantine``),
where they are run by someone with access to the host.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Annotated

from fastapi import APIRouter, Depends, HTTPException, Query, Request

from monitor.engine.model import ADVISORY
from monitor.shapes import payload_text, quarantine_item_json
from monitor.web.security import require_signed_in
from storage.quarantine import get_quarantined, list_quarantine

if TYPE_CHECKING:
    from monitor.web.app import WebContext

router = APIRouter(
    prefix="/api/quarantine", tags=["quarantine"], dependencies=[Depends(require_signed_in)]
)


@router.get("", summary="Refused input, newest first (no payloads)")
def list_items(
    request: Request,
    source: Annotated[str | None, Query(max_length=200)] = None,
    limit: Annotated[int, Query(ge=1, le=500)] = 50,
    before_id: Annotated[int | None, Query(ge=1)] = None,
    open_only: Annotated[bool, Query(alias="open")] = False,
) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    with ctx.db.begin(read_only=True) as conn:
        items = list_quarantine(
            conn,
            limit,
            source=source,
            with_raw=False,
            unresolved_only=open_only,
            before_id=before_id,
        )
    return {"items": [quarantine_item_json(i) for i in items], "advisory": ADVISORY}


@router.get("/{item_id}", summary="One refused input with its payload")
def show_item(request: Request, item_id: int) -> dict[str, object]:
    ctx: WebContext = request.app.state.ctx
    with ctx.db.begin(read_only=True) as conn:
        item = get_quarantined(conn, item_id)
    if item is None:
        raise HTTPException(404, f"no quarantined item {item_id}")
    return {**quarantine_item_json(item), "payload": payload_text(item.raw), "advisory": ADVISORY}
