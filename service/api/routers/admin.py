"""``POST /v1/admin/reload``: load the bundles again and swap them in (always behind a key)."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request

from causeline.service.api import problems
from causeline.service.api.bodies import ModelRef, ReloadResult
from causeline.service.api.dependencies import require_admin, service_of
from causeline.service.api.problems import Problem

router = APIRouter(tags=["admin"], dependencies=[Depends(require_admin)])


@router.post("/v1/admin/reload", response_model=ReloadResult,
             responses=problems.responses(401, 403, 409))
def reload(request: Request) -> ReloadResult:
    """Load the bundles again and swap them in; a bundle that fails verification is refused."""
    service = service_of(request)
    try:
        previous, served = service.reload()
    except Exception:
        raise Problem(
            409, f"refused; the previous bundles keep serving: "
            f"{service.registry.status.error}", "bundle-refused",
        ) from None
    refs = [ModelRef(name=n, version=v) for n, v in served.versions().items()]
    before = [] if previous is None else [
        ModelRef(name=n, version=v) for n, v in previous.versions().items()
    ]
    return ReloadResult(models=refs, previous=before)
