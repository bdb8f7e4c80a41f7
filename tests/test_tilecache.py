"""The per-worker cache of decoded tile files, and the digests of the parts a tile uses."""

import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from selector.errors import InputError
from selector.store.tilecache import TileCache, read_decoded


def _tile(path, n=50, seed=0, **changes):
    rng = np.random.default_rng(seed)
    cols = {"astro_id": np.arange(n, dtype=np.int64), "ra_deg": rng.uniform(10, 11, n),
            "dec_deg": rng.uniform(-1, 1, n), "parallax_mas": rng.normal(0, 1, n)}
    cols.update(changes)
    pq.write_table(pa.table(cols), path)
    return cols


def test_a_file_is_read_once_and_again_only_when_rewritten(tmp_path):
    path = tmp_path / "t.parquet"
    _tile(path)
    cache = TileCache()
    first = cache.get(path)
    assert cache.get(path) is first and cache.reads == 1 and cache.hits == 1
    # unit vectors of the rows, as the margin filters use them
    assert np.allclose(np.linalg.norm(first.xyz, axis=1), 1.0)
    _tile(path, seed=1)
    os.utime(path, ns=(first.mtime_ns + 1, first.mtime_ns + 1))
    again = cache.get(path)
    assert again is not first and cache.reads == 2
    assert again.sha256 != first.sha256


def test_missing_file_and_damaged_file(tmp_path):
    cache = TileCache()
    assert not cache.get(tmp_path / "none.parquet").exists
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(b"not a parquet file")
    with pytest.raises(InputError, match="bad.parquet: cannot read"):
        read_decoded(bad)


def test_the_cache_keeps_a_bounded_number_of_files(tmp_path):
    cache = TileCache(max_tiles=3)
    paths = [tmp_path / f"t{i}.parquet" for i in range(5)]
    for i, p in enumerate(paths):
        _tile(p, seed=i)
        cache.get(p)
    assert len(cache) == 3
    cache.get(paths[0])  # evicted, so read again
    assert cache.reads == 6
    small = TileCache(max_bytes=1)
    for p in paths:
        small.get(p)
    assert len(small) == 1  # the file just read always stays


def test_part_digest_follows_the_rows_and_columns_used(tmp_path):
    path = tmp_path / "t.parquet"
    cols = _tile(path)
    base = read_decoded(path)
    used = ["astro_id", "ra_deg", "dec_deg"]
    rows = np.arange(0, 50, 3)
    d = base.part_digest(rows, used)
    assert d == read_decoded(path).part_digest(rows, used)  # deterministic
    assert d != base.part_digest(rows[1:], used)            # other rows
    assert d != base.part_digest(rows, used + ["parallax_mas"])
    # a change to a column the part does not use leaves its digest alone...
    _tile(path, parallax_mas=cols["parallax_mas"] + 1.0)
    other = read_decoded(path)
    assert other.sha256 != base.sha256
    assert other.part_digest(rows, used) == d
    # ...but not the digest of the whole file, nor of a part using that column
    assert other.part_digest() != base.part_digest()
    assert other.part_digest(rows, used + ["parallax_mas"]) != base.part_digest(rows, used + ["parallax_mas"])
    # a changed position anywhere in the file changes the parts that use positions
    dec = cols["dec_deg"].copy()
    dec[1] += 1e-9
    _tile(path, dec_deg=dec)
    assert read_decoded(path).part_digest(rows, used) != d


def test_part_digest_of_text_columns_and_nulls(tmp_path):
    path = tmp_path / "t.parquet"
    pq.write_table(pa.table({"ir_id": pa.array(["a", "b", None]), "ra_deg": [1.0, None, 2.0],
                             "dec_deg": [0.0, 0.0, 0.0]}), path)
    one = read_decoded(path).part_digest(np.array([0, 1]), ["ir_id", "ra_deg"])
    pq.write_table(pa.table({"ir_id": pa.array(["a", "c", None]), "ra_deg": [1.0, None, 2.0],
                             "dec_deg": [0.0, 0.0, 0.0]}), path)
    assert read_decoded(path).part_digest(np.array([0, 1]), ["ir_id", "ra_deg"]) != one
    pq.write_table(pa.table({"ir_id": pa.array(["a", "b", None]), "ra_deg": [1.0, 0.0, 2.0],
                             "dec_deg": [0.0, 0.0, 0.0]}), path)
    # a null and a zero are not the same value
    assert read_decoded(path).part_digest(np.array([0, 1]), ["ir_id", "ra_deg"]) != one
