"""Fingerprints: a hash of the canonical request, equal on every replica."""

from __future__ import annotations

import hashlib
import json

from pydantic import BaseModel

__all__ = ["fingerprint"]

#: Bumped whenever the meaning of a request changes, so old fingerprints stop matching.
CONTRACT = "movecast-design-1"


def fingerprint(request: BaseModel) -> str:
    """Return ``sha256:<hex>`` of the request in canonical JSON.

    Canonical means: every default filled in, keys sorted, no whitespace, floats in
    shortest round-trip form (Python's ``repr``), integers written as floats where the
    field is a float.  Equal requests give equal fingerprints on any replica and any
    platform; changing any number changes it.
    """
    body = request.model_dump(mode="json")
    text = json.dumps([CONTRACT, body], sort_keys=True, separators=(",", ":"), allow_nan=False)
    return "sha256:" + hashlib.sha256(text.encode("utf-8")).hexdigest()
