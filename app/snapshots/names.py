"""Names of downloaded versions, the same from the server's answer and the command line."""

from __future__ import annotations


def download_name(slug: str, version: int, since: int | None, file_format: str) -> str:
    """A download name such as tow-tractor-v3.parquet, or tow-tractor-v3-since-v1.parquet for
    the rows of v3 not identical in v1: an incremental file never takes a full version's name."""
    tail = "" if since is None else f"-since-v{since}"
    return f"{slug}-v{version}{tail}.{file_format}"
