"""Fingerprints: a hash of the canonical request, equal on every replica."""

from __future__ import annotations

import hashlib
import json

from pydantic import BaseModel

__all__ = ["design_fingerprint", "fingerprint"]

#: Bumped whenever the meaning of a request changes, so old fingerprints stop matching.
CONTRACT = "movecast-design-1"


def fingerprint(request: BaseModel) -> str:
    """Return ``sha256:<hex>`` of the request in canonical JSON.

    Canonical means: every default filled in, keys sorted, no whitespace, floats in
    shortest round-trip form (Python's ``repr``), integers written as floats where the
    field is a float.  Equal requests give equal fingerprints on any replica and any
    platform; changing any number changes it.
    """
    return _hash(request.model_dump(mode="json"))


def design_fingerprint(request: BaseModel) -> str:
    """The :func:`fingerprint` of the /design request within ``request`` (its design fields).

    A /simulate request carries a design request's fields and a scenario; its design part
    hashes exactly as the same fields sent to POST /design.
    """
    from service.schemas.design import DesignRequest

    return _hash(request.model_dump(mode="json", include=set(DesignRequest.model_fields)))


def _hash(body: object) -> str:
    text = json.dumps([CONTRACT, body], sort_keys=True, separators=(",", ":"), allow_nan=False)
    return "sha256:" + hashlib.sha256(text.encode("utf-8")).hexdigest()
