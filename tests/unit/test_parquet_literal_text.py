"""Which Parquet text columns are read without a dictionary: those whose every chunk declares a
literal encoding (camera images written as the README advises), read to the same values and held
to the same size limit as dictionary-read text."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from expertloop.errors import TooLarge
from expertloop.ingest import formats


def parquet_file(table: pa.Table, **options) -> pq.FileMetaData:
    sink = io.BytesIO()
    pq.write_table(table, sink, **options)
    return pq.ParquetFile(io.BytesIO(sink.getvalue())).metadata


def test_only_text_stored_literally_is_read_without_a_dictionary():
    # docs/references.md, "Parquet encodings": files written by pyarrow's writer
    table = pa.table({"image": pa.array([b"\x89PNG", b"x"]), "robot": pa.array(["a", "a"])})
    assert formats._literal_columns(parquet_file(table)) == set()  # pyarrow's default
    plain = parquet_file(table, use_dictionary=["robot"])
    assert formats._literal_columns(plain) == {"image"}
    delta = parquet_file(table, use_dictionary=False, column_encoding={"image": "DELTA_BYTE_ARRAY"})
    assert formats._literal_columns(delta) == {"robot"}
    lengths = parquet_file(
        table, use_dictionary=False, column_encoding={"image": "DELTA_LENGTH_BYTE_ARRAY"}
    )
    assert formats._literal_columns(lengths) == {"image", "robot"}


def write(tmp_path, table: pa.Table, **options):
    path = tmp_path / "t.parquet"
    pq.write_table(table, path, **options)
    return path


def test_literal_and_dictionary_text_read_to_the_same_values(tmp_path):
    rng = np.random.default_rng(5)
    values = [rng.bytes(int(n)) for n in rng.integers(1, 3000, size=300)]
    values[10] = values[3]  # a repeat: the dictionary's indices are then not 0, 1, 2, ...
    table = pa.table({"image": pa.array(values, pa.binary())})
    for options in ({}, {"use_dictionary": False}):
        got = formats.read_table(write(tmp_path, table, **options), "parquet")
        assert got["image"].type == pa.binary()
        assert got["image"].to_pylist() == values
    unique = pa.table({"image": pa.array(values[:10], pa.binary())})
    got = formats.read_table(write(tmp_path, unique), "parquet")
    assert got["image"].to_pylist() == values[:10]


def test_literal_text_is_still_held_to_the_array_limit(tmp_path):
    table = pa.table({"image": pa.array([bytes(5000)] * 400, pa.binary())})
    path = write(tmp_path, table, use_dictionary=False, compression="zstd")
    assert path.stat().st_size < 100_000
    with pytest.raises(TooLarge, match="would expand to"):
        formats.read_table(path, "parquet", max_array_bytes=1_000_000)
