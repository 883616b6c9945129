"""Python client for fleet scripts and training jobs (httpx)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import IO, Any

import httpx

DEFAULT_TIMEOUT = httpx.Timeout(30.0, read=600.0, write=600.0)


class ApiError(RuntimeError):
    """The service refused a request; the message is the service's own."""

    def __init__(self, status_code: int, detail: str) -> None:
        super().__init__(f"HTTP {status_code}: {detail}")
        self.status_code = status_code
        self.detail = detail


class _ProgressReader:
    """File wrapper that reports bytes read, so uploads can show progress."""

    def __init__(self, handle: IO[bytes], report: Callable[[int], object]) -> None:
        self._handle = handle
        self._report = report

    def read(self, size: int = -1) -> bytes:
        chunk = self._handle.read(size)
        self._report(len(chunk))
        return chunk


class Client:
    """A thin client over the HTTP API, authenticated by an API token."""

    def __init__(self, url: str, token: str, *, transport: httpx.BaseTransport | None = None):
        self._http = httpx.Client(
            base_url=url.rstrip("/"),
            headers={"Authorization": f"Bearer {token}"},
            timeout=DEFAULT_TIMEOUT,
            transport=transport,
        )

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *_: object) -> None:
        self.close()

    def request(self, method: str, path: str, **kwargs: Any) -> Any:
        """Send a request; return decoded JSON, or raise ApiError with the service's message."""
        response = self._http.request(method, path, **kwargs)
        if response.status_code >= 400:
            try:
                detail = response.json().get("detail", response.text)
            except ValueError:
                detail = response.text
            raise ApiError(response.status_code, str(detail))
        if response.headers.get("content-type", "").startswith("application/json"):
            return response.json()
        return response.content

    def stream(self, path: str, **kwargs: Any) -> Iterator[bytes]:
        """Stream a response body in chunks (large exports)."""
        with self._http.stream("GET", path, **kwargs) as response:
            if response.status_code >= 400:
                response.read()
                raise ApiError(response.status_code, response.text)
            yield from response.iter_bytes()

    # loops and rounds
    def create_loop(self, spec: dict[str, Any]) -> Any:
        return self.request("POST", "/api/loops", json=spec)

    def loop(self, slug: str) -> Any:
        return self.request("GET", f"/api/loops/{slug}")

    def rounds(self, slug: str) -> Any:
        return self.request("GET", f"/api/loops/{slug}/rounds")["items"]

    def open_round(self, slug: str, learner_version: str) -> Any:
        return self.request(
            "POST", f"/api/loops/{slug}/rounds", json={"learner_version": learner_version}
        )

    def close_round(self, slug: str, number: int) -> Any:
        return self.request("POST", f"/api/loops/{slug}/rounds/{number}/close")

    # rollouts
    def upload(
        self,
        slug: str,
        round_number: int,
        path: Path,
        progress: Callable[[int], object] | None = None,
    ) -> Any:
        """Upload one rollout file; `progress` is called with the bytes sent so far."""
        with path.open("rb") as handle:
            body: Any = _ProgressReader(handle, progress) if progress else handle
            return self.request(
                "POST",
                f"/api/loops/{slug}/rounds/{round_number}/rollouts",
                files={"file": (path.name, body, "application/octet-stream")},
            )
