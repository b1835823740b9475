"""A typed Python client for movecast, built on httpx (an example to copy, not a package).

    python openapi/examples/client.py http://127.0.0.1:8000            # design the example plant
    MOVECAST_API_KEY=... python openapi/examples/client.py https://...  # with an API key

Every error answer of the service is an RFC 9457 problem; the client raises it as
:class:`ProblemError`, whose ``errors`` name each bad field by JSON pointer.  Responses are
returned as the TypedDicts below (plain dicts at run time, typed for the checker).
"""

from __future__ import annotations

import json
import os
import sys
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, NotRequired, TypedDict

import httpx

__all__ = [
    "BatchItem",
    "BatchItemResult",
    "DesignResponse",
    "IdentifyResponse",
    "MovecastClient",
    "ProblemError",
]

Matrix = list[list[float]]


class Gain(TypedDict):
    horizon: Matrix
    state: Matrix
    previous_input: Matrix
    setpoint: Matrix


class Hessian(TypedDict):
    condition_number: float
    smallest_eigenvalue: float
    largest_eigenvalue: float
    size: int


class Pole(TypedDict):
    real: float
    imag: float


class ClosedLoop(TypedDict):
    poles: list[Pole]
    spectral_radius: float
    stable: bool


class Warning_(TypedDict):
    code: str
    message: str


class DesignResponse(TypedDict):
    """POST /design's answer (fields added by later versions pass through untouched)."""

    gain: Gain
    hessian: Hessian
    closed_loop: ClosedLoop
    warnings: list[Warning_]
    fingerprint: str
    advisory: str


class IdentifyResponse(TypedDict):
    """The fields of the /identify answer this client reads; ``model`` posts back to /design unchanged."""

    model: dict[str, Any]
    pairs: list[dict[str, Any]]
    fits: list[dict[str, Any]]
    warnings: list[Warning_]


class FieldError(TypedDict):
    pointer: str
    detail: str


class Problem(TypedDict):
    type: str
    title: str
    status: int
    detail: str
    instance: str
    errors: list[FieldError]
    omitted_errors: NotRequired[int]  # how many bad fields beyond the 50 that errors lists


class BatchItem(TypedDict):
    """One item of POST /design/batch."""

    id: str
    request: dict[str, Any]
    known_fingerprint: NotRequired[str]


class BatchItemResult(TypedDict):
    id: str
    status: Literal["designed", "unchanged", "failed"]
    fingerprint: str | None
    result: DesignResponse | None
    problem: Problem | None


@dataclass
class ProblemError(Exception):
    """The service answered with a problem (4xx or 5xx)."""

    status: int
    problem: Problem
    request_id: str = ""

    def __str__(self) -> str:
        fields = "; ".join(f"{e['pointer']}: {e['detail']}" for e in self.problem.get("errors", []))
        return f"{self.status} {self.problem.get('detail', '')}" + (f" ({fields})" if fields else "")

    @property
    def errors(self) -> list[FieldError]:
        return self.problem.get("errors", [])


@dataclass
class MovecastClient:
    """Calls the movecast API over an :class:`httpx.Client` (pass your own to reuse one).

    Parameters
    ----------
    base_url : str
        e.g. ``http://127.0.0.1:8000``.
    api_key : str, optional
        Sent as ``Authorization: Bearer <key>`` when given.
    http : httpx.Client, optional
        A client to send through (its base URL is then used); tests pass an in-process one.
    timeout : float
        Seconds to wait for an answer; keep it above the service's compute time limit.
    """

    base_url: str = "http://127.0.0.1:8000"
    api_key: str | None = None
    http: httpx.Client | None = None
    timeout: float = 60.0
    _owned: bool = field(default=False, init=False, repr=False)

    def __post_init__(self) -> None:
        if self.http is None:
            self.http = httpx.Client(base_url=self.base_url, timeout=self.timeout)
            self._owned = True

    def close(self) -> None:
        if self._owned and self.http is not None:
            self.http.close()

    def __enter__(self) -> MovecastClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _send(
        self,
        method: str,
        path: str,
        body: Any = None,
        *,
        csv: bytes | None = None,
        params: dict[str, str | float | bool] | None = None,
    ) -> Any:
        assert self.http is not None
        headers = {"X-Request-ID": uuid.uuid4().hex}
        if self.api_key:
            headers["Authorization"] = f"Bearer {self.api_key}"
        if csv is not None:
            headers["Content-Type"] = "text/csv"
            response = self.http.request(method, path, content=csv, params=params, headers=headers)
        else:
            response = self.http.request(method, path, json=body, headers=headers)
        if response.is_error:
            try:
                problem = response.json()
            except ValueError:
                problem = {
                    "type": "about:blank",
                    "title": "",
                    "status": response.status_code,
                    "detail": response.text[:200],
                    "instance": path,
                    "errors": [],
                }
            raise ProblemError(response.status_code, problem, response.headers.get("x-request-id", ""))
        return response.json()

    def design(self, request: dict[str, Any]) -> DesignResponse:
        """POST /design."""
        answer: DesignResponse = self._send("POST", "/design", request)
        return answer

    def design_batch(self, items: list[BatchItem]) -> list[BatchItemResult]:
        """POST /design/batch: one result per item, in order."""
        answer: list[BatchItemResult] = self._send("POST", "/design/batch", {"items": items})["items"]
        return answer

    def identify(self, request: dict[str, Any]) -> IdentifyResponse:
        """POST /identify with the plant test as JSON columns."""
        answer: IdentifyResponse = self._send("POST", "/identify", request)
        return answer

    def identify_csv(self, csv: bytes, **choices: str | float | bool) -> IdentifyResponse:
        """POST /identify with a historian's CSV export (text/csv) and the choices as query parameters.

        ``choices`` are the query parameters: ``sample_time``, ``inputs`` and ``outputs`` (tags
        comma-separated) at least.
        """
        answer: IdentifyResponse = self._send("POST", "/identify", csv=csv, params=dict(choices))
        return answer

    def healthy(self) -> bool:
        """GET /healthz."""
        return bool(self._send("GET", "/healthz")["status"] == "ok")

    def ready(self) -> bool:
        """GET /readyz: False while the service starts or shuts down."""
        try:
            return bool(self._send("GET", "/readyz")["status"] == "ready")
        except ProblemError:
            return False


def main(argv: list[str]) -> int:
    base_url = argv[1] if len(argv) > 1 else "http://127.0.0.1:8000"
    request = json.loads((Path(__file__).with_name("design_request.json")).read_text(encoding="utf-8"))
    with MovecastClient(base_url, api_key=os.environ.get("MOVECAST_API_KEY")) as client:
        try:
            design = client.design(request)
        except ProblemError as exc:
            print(f"refused: {exc}", file=sys.stderr)
            return 1
    print(
        f"stable: {design['closed_loop']['stable']}, spectral radius "
        f"{design['closed_loop']['spectral_radius']:.4f}, Kx = {design['gain']['state']}"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
