"""Python client for fleet scripts and training jobs (httpx)."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

import httpx

if TYPE_CHECKING:
    import numpy as np
    import pyarrow as pa

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

    def set_log_mapping(self, slug: str, mapping: dict[str, Any]) -> Any:
        """Set or replace a loop's log mapping (admin); the loop as it is now."""
        return self.request("PUT", f"/api/loops/{slug}/log-mapping", json={"log_mapping": mapping})

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

    # snapshots (training-set versions)
    def create_snapshot(self, slug: str, up_to_round: int | None = None) -> Any:
        """Make the next version up to a round (default: the newest round)."""
        return self.request(
            "POST", f"/api/loops/{slug}/snapshots", json={"up_to_round": up_to_round}
        )

    def snapshots(self, slug: str) -> Any:
        return self.request("GET", f"/api/loops/{slug}/snapshots")["items"]

    def snapshot(self, slug: str, version: str = "latest") -> Any:
        """One version's summary and manifest."""
        return self.request("GET", f"/api/loops/{slug}/snapshots/{version}")

    def export(
        self,
        loop: str,
        out: Path,
        *,
        version: str = "latest",
        file_format: str = "parquet",
        since: str | None = None,
        progress: Callable[[int], object] | None = None,
        size: Callable[[int], object] | None = None,
    ) -> dict[str, str]:
        """Download a version to `out` (parquet, npz or jsonl); returns the response headers.

        The file appears under its name only when complete; `progress` gets each chunk's size,
        and `size` the whole file's, once, when the server knows it beforehand (a version's
        stored Parquet file).
        """
        params = {"format": file_format} | ({"since": since} if since else {})
        partial = out.with_name(out.name + ".part")
        path = f"/api/loops/{loop}/snapshots/{version}/export"
        try:
            with self._http.stream("GET", path, params=params) as response:
                if response.status_code >= 400:
                    response.read()
                    raise ApiError(response.status_code, _detail(response))
                if size and "content-length" in response.headers:
                    size(int(response.headers["content-length"]))
                with partial.open("wb") as handle:
                    for chunk in response.iter_bytes():
                        handle.write(chunk)
                        if progress:
                            progress(len(chunk))
                headers = dict(response.headers)
            os.replace(partial, out)
        finally:
            partial.unlink(missing_ok=True)
        return headers

    def pull(
        self,
        loop: str,
        version: str = "latest",
        as_table: bool = False,
        since: str | None = None,
    ) -> dict[str, np.ndarray] | pa.Table:
        """A version's rows as numpy arrays by column name (or a pyarrow Table).

        Arrays: features (n, n_features) float32; expert_action (n,) int64 for a discrete loop
        or (n, n_dims) float32; step_id, round, step, label_count (n,) int64; agreement (n,)
        float64; source, learner_version, rollout (n,) str objects.
        """
        import pyarrow.parquet as pq

        with tempfile.TemporaryDirectory() as folder:
            target = Path(folder) / "rows.parquet"
            self.export(loop, target, version=version, file_format="parquet", since=since)
            table = pq.read_table(target, memory_map=False)
        return table if as_table else table_arrays(table)


def _detail(response: httpx.Response) -> str:
    try:
        return str(response.json().get("detail", response.text))
    except ValueError:  # not JSON
        return response.text


def table_arrays(table: pa.Table) -> dict[str, np.ndarray]:
    """Columns of an exported table as numpy arrays; fixed-size lists become 2-D arrays."""
    import numpy as np
    import pyarrow as pa

    out: dict[str, np.ndarray] = {}
    for name in table.column_names:
        column = table.column(name).combine_chunks()
        if pa.types.is_fixed_size_list(column.type):
            width = column.type.list_size
            values = column.flatten().to_numpy(zero_copy_only=False)
            out[name] = values.reshape(len(column), width)
        else:
            out[name] = np.asarray(column.to_numpy(zero_copy_only=False))
    return out
