"""Readers and writers: every input format round-trips a table with units through ingest.

The expected tile values are computed with ``astropy.units`` (``Quantity(value, unit).to(canonical)``)
from the values written, so a unit read from the wrong place, or not at all, shows up as a factor of
1000 or so.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import astropy.units as u
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.table import MaskedColumn, Table

from selector.store import io
from selector.errors import InputError
from selector.jobs.ingest import ingest_catalogue
from selector.store.layout import layout_of

from conftest import base_config, build, random_astro

N = 60
#: Columns written in a unit other than the canonical one; the file (or the config) must say so.
FILE_UNITS = {"plx": "uas", "pmra": "arcsec / yr", "ra": "deg", "dec": "deg", "eplx": "mas",
              "pmdec": "mas / yr", "epmra": "mas / yr", "epmdec": "mas / yr", "g": "mag", "eg": "mag"}
CANONICAL = {"plx": ("parallax_mas", "mas"), "pmra": ("pmra_mas_yr", "mas / yr"), "ra": ("ra_deg", "deg"),
             "dec": ("dec_deg", "deg"), "eplx": ("parallax_error_mas", "mas"),
             "pmdec": ("pmdec_mas_yr", "mas / yr"), "epmra": ("pmra_error_mas_yr", "mas / yr"),
             "epmdec": ("pmdec_error_mas_yr", "mas / yr"), "g": ("opt_broad_abmag", None),
             "eg": ("opt_broad_mag_error", None)}
MASKED = {"plx": np.arange(N) % 7 == 3, "pmdec": np.arange(N) % 11 == 5, "g": np.arange(N) % 13 == 0}


def _source(rng, text_ids: bool) -> dict:
    """Values as written to the file, in FILE_UNITS, with masks for the null cells."""
    a = random_astro(N, rng)
    a["plx"] = a["plx"] * 1000.0           # mas → uas, as the file declares
    a["pmra"] = a["pmra"] / 1000.0         # mas/yr → arcsec/yr
    if text_ids:
        a["sid"] = np.array([f"S{i:06d}" for i in a["sid"]])
    return a


def _astropy_table(a: dict) -> Table:
    t = Table()
    t["sid"] = a["sid"]
    for name, unit in FILE_UNITS.items():
        if name in MASKED:
            t[name] = MaskedColumn(a[name], mask=MASKED[name], unit=unit)
        else:
            t[name] = a[name] * u.Unit(unit)
    return t


def _arrow_table(a: dict) -> pa.Table:
    id_type = pa.string() if a["sid"].dtype.kind == "U" else pa.int64()
    fields, arrays = [pa.field("sid", id_type)], [pa.array(a["sid"], id_type)]
    for name, unit in FILE_UNITS.items():
        fields.append(pa.field(name, pa.float64(), metadata={"unit": unit}))
        arrays.append(pa.array(a[name], mask=MASKED.get(name)))
    return pa.Table.from_arrays(arrays, schema=pa.schema(fields))


def _write(fmt: str, a: dict, folder: Path) -> list[str]:
    """Write the catalogue in one format; returns the ``files`` entry of the config."""
    if fmt == "parquet":
        pq.write_table(_arrow_table(a), folder / "astro.parquet")
        return ["astro.parquet"]
    if fmt in ("parquet_folder", "parquet_glob"):
        parts = folder / "parts"
        parts.mkdir()
        table = _arrow_table(a)
        for i, start in enumerate(range(0, N, 25)):
            pq.write_table(table.slice(start, 25), parts / f"part-{i:03d}.parquet")
        if fmt == "parquet_folder":
            (parts / "_SUCCESS").write_text("")   # marker files of other writers are skipped
            return ["parts"]
        (parts / "notes.txt").write_text("not a catalogue")  # the pattern must not pick this up
        return ["parts/part-*.parquet"]
    t = _astropy_table(a)
    name, astropy_fmt = {"fits": ("astro.fits", "fits"), "csv": ("astro.csv", "ascii.csv"),
                         "ecsv": ("astro.ecsv", "ascii.ecsv"), "votable": ("astro.vot", "votable")}[fmt]
    t.write(folder / name, format=astropy_fmt)
    return [name]


def _config(tmp_path, files, units_in_config=False, extra=None):
    data = base_config()
    data["astrometric"]["files"] = files
    if units_in_config:
        for role, spec in list(data["astrometric"]["columns"].items()):
            if spec in ("plx", "pmra"):
                data["astrometric"]["columns"][role] = {"column": spec, "unit": FILE_UNITS[spec]}
    data["astrometric"].update(extra or {})
    return build(data, tmp_path)


def _tiles(cfg) -> pa.Table:
    order = cfg.tiling.order
    parts = [pq.read_table(layout_of(cfg).tile_file("astrometric", order, t))
             for t in layout_of(cfg).list_tiles("astrometric", order)]
    return pa.concat_tables(parts).sort_by("astro_id")


FORMATS = ["parquet", "parquet_folder", "parquet_glob", "fits", "csv", "ecsv", "votable"]


@pytest.mark.parametrize("text_ids", [False, True], ids=["int_id", "text_id"])
@pytest.mark.parametrize("fmt", FORMATS)
def test_every_format_round_trips_values_units_and_nulls(tmp_path, rng, fmt, text_ids):
    a = _source(rng, text_ids)
    files = _write(fmt, a, tmp_path)
    # CSV has nowhere to keep units, so there the config gives them; elsewhere the file's own are used
    cfg = _config(tmp_path, files, units_in_config=(fmt == "csv"))
    s = ingest_catalogue(cfg, "astrometric", log=lambda *x: None)
    assert s.rows_in == N and s.accepted == N and not s.rejected
    got = _tiles(cfg)
    order = np.argsort(a["sid"].astype(str) if fmt == "csv" or text_ids else a["sid"], kind="stable")
    ids = got.column("astro_id").to_pylist()
    if text_ids:
        assert ids == [str(x) for x in a["sid"][order]]
    elif fmt == "csv":
        assert ids == [str(x) for x in a["sid"][order]]  # CSV ids stay text (see test_ingest)
    else:
        assert got.schema.field("astro_id").type == pa.int64()
        assert ids == a["sid"][order].tolist()
    for name, (canonical, unit) in CANONICAL.items():
        want = np.asarray(a[name], float)[order]
        if unit is not None:
            # reference: astropy.units conversion of the unit the file (or config) declares
            want = u.Quantity(want, FILE_UNITS[name]).to_value(unit)
        mask = MASKED.get(name, np.zeros(N, bool))[order]
        want = np.where(mask, np.nan, want)
        col = got.column(canonical).to_numpy()
        np.testing.assert_allclose(col, want, rtol=1e-12, atol=0, equal_nan=True, err_msg=f"{fmt} {canonical}")
        assert np.array_equal(np.isnan(col), mask), f"{fmt} {canonical}: nulls must become NaN, only there"
        if unit is not None:
            assert got.schema.field(canonical).metadata[b"unit"].decode() == unit


def test_config_unit_wins_over_the_file_unit(tmp_path, rng):
    a = _source(rng, False)
    files = _write("parquet", a, tmp_path)
    data = base_config()
    data["astrometric"]["files"] = files
    data["astrometric"]["columns"]["parallax"] = {"column": "plx", "unit": "mas"}  # file says uas
    cfg = build(data, tmp_path)
    ingest_catalogue(cfg, "astrometric", log=lambda *x: None)
    got = _tiles(cfg)
    np.testing.assert_array_equal(got.column("parallax_mas").to_numpy(), np.where(MASKED["plx"], np.nan, a["plx"]))
    # pmra has no config unit, so its file unit still applies
    np.testing.assert_allclose(got.column("pmra_mas_yr").to_numpy(), a["pmra"] * 1000.0, rtol=1e-12)


@pytest.mark.parametrize("fmt", ["fits", "parquet"])
def test_file_unit_that_cannot_convert_is_one_line_error(tmp_path, rng, fmt):
    a = _source(rng, False)
    if fmt == "fits":
        t = _astropy_table(a)
        t["plx"].unit = u.km
        t.write(tmp_path / "astro.fits")
        files = ["astro.fits"]
    else:
        table = _arrow_table(a)
        i = table.schema.get_field_index("plx")
        table = table.set_column(i, table.schema.field(i).with_metadata({"unit": "km"}), table.column(i))
        pq.write_table(table, tmp_path / "astro.parquet")
        files = ["astro.parquet"]
    cfg = _config(tmp_path, files)
    with pytest.raises(InputError) as err:
        ingest_catalogue(cfg, "astrometric", log=lambda *x: None)
    text = str(err.value)
    assert "\n" not in text and files[0] in text and "'plx'" in text and "km" in text


def test_compressed_csv_and_byte_order_mark_are_read(tmp_path, rng):
    import gzip

    a = _source(rng, False)
    _astropy_table(a).write(tmp_path / "plain.csv", format="ascii.csv")
    text = (tmp_path / "plain.csv").read_bytes()
    with gzip.open(tmp_path / "astro.csv.gz", "wb") as fh:
        fh.write(text)
    (tmp_path / "bom.csv").write_bytes(b"\xef\xbb\xbf" + text)
    for name in ("astro.csv.gz", "bom.csv"):
        cfg = _config(tmp_path, [name], units_in_config=True)
        s = ingest_catalogue(cfg, "astrometric", log=lambda *x: None)
        assert s.accepted == N, name
        np.testing.assert_allclose(_tiles(cfg).column("pmra_mas_yr").to_numpy(),
                                   (a["pmra"] * u.Unit("arcsec / yr")).to_value("mas / yr")[
                                       np.argsort(a["sid"].astype(str), kind="stable")], rtol=1e-12)


# --- iter_chunks ---------------------------------------------------------------------------------

def _chunk_source(n, rng):
    return {"k": np.arange(n, dtype=np.int64), "x": rng.normal(size=n)}


def _write_chunk_file(fmt, cols, path):
    if fmt == "parquet":
        # row groups of a size unrelated to chunk_rows, so batches straddle row-group edges
        pq.write_table(pa.table(cols), path, row_group_size=777)
    elif fmt == "csv":
        lines = ["k,x"] + [f"{k},{float(x)!r}" for k, x in zip(cols["k"], cols["x"])]
        path.write_text("\n".join(lines) + "\n")
    else:
        Table(cols).write(path, format="fits")


@pytest.mark.parametrize("fmt,n,chunk_rows", [
    ("parquet", 5000, 1000), ("parquet", 5000, 333), ("parquet", 10, 1000),
    # > 1 MiB of text: several pyarrow blocks whose edges do not fall on chunk edges
    ("csv", 60000, 7001), ("csv", 500, 100), ("csv", 10, 1000),
    ("fits", 2500, 1000),
])
def test_iter_chunks_bounded_in_order_and_complete(tmp_path, rng, fmt, n, chunk_rows):
    ending = {"parquet": "parquet", "csv": "csv", "fits": "fits"}[fmt]
    sources = [_chunk_source(n, rng), _chunk_source(n // 2 + 1, rng)]
    paths = []
    for i, cols in enumerate(sources):
        paths.append(tmp_path / f"f{i}.{ending}")
        _write_chunk_file(fmt, cols, paths[-1])
    chunks = list(io.iter_chunks(paths, "auto", ["x", "k"], chunk_rows))
    assert all(0 < c.table.num_rows <= chunk_rows for c in chunks)
    for path, cols in zip(paths, sources):
        mine = [c for c in chunks if c.path == path]
        starts = [c.first_row for c in mine]
        sizes = [c.table.num_rows for c in mine]
        assert starts == list(np.cumsum([0] + sizes[:-1]))
        assert sum(sizes) == len(cols["k"])
        assert all(c.table.column_names == ["x", "k"] for c in mine)
        k = np.concatenate([np.asarray(c.table.column("k").to_pylist(), dtype=np.int64) for c in mine])
        x = np.concatenate([np.asarray(c.table.column("x").to_pylist(), dtype=float) for c in mine])
        np.testing.assert_array_equal(k, cols["k"])
        np.testing.assert_array_equal(x, cols["x"])
    # files come out one after the other, in the order given
    assert [c.path for c in chunks] == sorted((c.path for c in chunks), key=paths.index)


def test_iter_chunks_names_a_missing_column(tmp_path, rng):
    path = tmp_path / "a.parquet"
    _write_chunk_file("parquet", _chunk_source(10, rng), path)
    with pytest.raises(InputError, match=r"a.parquet: column 'xx' named in the config is not in the file; "
                                         r"the nearest is 'x'; the file's columns are: k, x"):
        list(io.iter_chunks([path], "auto", ["xx"], 1000))


def test_damaged_file_is_one_line_error(tmp_path):
    path = tmp_path / "a.parquet"
    path.write_bytes(b"PAR1 this is not really parquet")
    with pytest.raises(InputError) as err:
        list(io.iter_chunks([path], "auto", ["x"], 1000))
    assert "\n" not in str(err.value) and "a.parquet: cannot read as parquet" in str(err.value)


# --- expand_files --------------------------------------------------------------------------------

def test_expand_files_errors_are_one_line(tmp_path):
    (tmp_path / "empty").mkdir()
    (tmp_path / "hidden").mkdir()
    (tmp_path / "hidden" / ".keep").write_text("")
    cases = [
        (["nothing-*.parquet"], r"nothing-\*\.parquet: no file matches this pattern"),
        (["empty"], r"empty: folder holds no files"),
        (["hidden"], r"hidden: folder holds no files"),
        (["absent.fits"], r"absent.fits: no such file"),
    ]
    for patterns, message in cases:
        with pytest.raises(InputError, match=message) as err:
            io.expand_files(patterns, tmp_path)
        assert "\n" not in str(err.value)


def test_expand_files_is_sorted_and_unique(tmp_path):
    for name in ("b.parquet", "a.parquet", "sub/c.parquet"):
        (tmp_path / name).parent.mkdir(exist_ok=True)
        (tmp_path / name).write_text("")
    got = io.expand_files(["b.parquet", "*.parquet", str(tmp_path)], tmp_path)
    assert got == [tmp_path / "b.parquet", tmp_path / "a.parquet", tmp_path / "sub" / "c.parquet"]


# --- atomic writers ------------------------------------------------------------------------------

def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_write_parquet_failure_leaves_old_file_and_no_temp(tmp_path, monkeypatch):
    target = tmp_path / "out" / "t.parquet"
    io.write_parquet(pa.table({"a": [1, 2]}), target)
    before = target.read_bytes()

    def half_write(table, where, **kwargs):
        Path(where).write_bytes(b"PAR1 half")
        raise OSError("disk full")

    monkeypatch.setattr(io.pq, "write_table", half_write)
    with pytest.raises(OSError, match="disk full"):
        io.write_parquet(pa.table({"a": [3]}), target)
    assert target.read_bytes() == before
    assert _leftovers(target.parent) == ["t.parquet"]


def test_write_json_and_text_failures_leave_no_temp(tmp_path):
    with pytest.raises(TypeError):
        io.write_json({"x": object()}, tmp_path / "a.json")
    with pytest.raises(TypeError):
        io.write_text(12345, tmp_path / "a.txt")
    assert _leftovers(tmp_path) == []
    io.write_json({"b": 1, "a": np.int64(2), "p": Path("x")}, tmp_path / "a.json")
    assert json.loads((tmp_path / "a.json").read_text()) == {"a": 2, "b": 1, "p": "x"}
    assert _leftovers(tmp_path) == ["a.json"]


def test_write_table_failure_leaves_no_temp(tmp_path):
    class Failing(Table):
        def write(self, where, **kwargs):
            Path(where).write_text("half")
            raise ValueError("cannot encode")

    with pytest.raises(ValueError):
        io.write_table(Failing({"a": [1.0]}), tmp_path / "a.ecsv", "ecsv")
    assert _leftovers(tmp_path) == []
    io.write_table(Table({"a": [1.0]}), tmp_path / "a.ecsv", "ecsv")
    assert Table.read(tmp_path / "a.ecsv")["a"][0] == 1.0 and _leftovers(tmp_path) == ["a.ecsv"]


def test_atomic_outputs_follow_the_umask(tmp_path):
    import os
    import stat

    from selector.store.io import write_text

    path = write_text("x", tmp_path / "out.txt")
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~mask


def test_float_text_is_what_python_writes_at_every_magnitude():
    # astropy's text writers write str(x); float_text reaches the same text from pyarrow's, whose
    # layout differs (exponents from 1e10, fixed notation down to 1e-6, one-digit exponents)
    rng = np.random.default_rng(5)
    values = [10.0 ** rng.uniform(-30, 30, 20000) * rng.choice([-1.0, 1.0], 20000)]
    for decimals in (1, 3, 7, 12):
        values.append(np.round(rng.uniform(0, 1, 2000) * 10.0 ** rng.integers(-12, 18, 2000), decimals))
    values.append(np.array([0.0, -0.0, np.nan, np.inf, -np.inf, 1e-4, 9.999999999999999e-05, 1e-6, 9.99e-7, 1e-5,
                            -2.5e-5, 3e-6, 1e-7, 1e9, 1e10, 9999999999.5, 12345678901.0, -12345678901.25, 1e15,
                            9999999999999998.0, 1234567890123456.8, 1e16, 1.5e45, 5e-324, 1.7976931348623157e308]))
    x = np.concatenate(values)
    assert io.float_text(pa.array(x)).to_pylist() == [repr(v) for v in x.tolist()]
    rounded = np.round(x, 3) + 0.0
    assert io.float_text(pa.array(x), 3).to_pylist() == [repr(v) for v in rounded.tolist()]


def test_text_body_writes_the_bytes_of_astropy(tmp_path):
    # every kind the column writer takes (floats at any magnitude, integers, booleans, plain text):
    # the rows equal astropy's, header aside
    n = 500
    rng = np.random.default_rng(8)
    table = pa.table({"astro_id": np.arange(n, dtype=np.int64) * 7919, "ra_deg": rng.uniform(0, 360, n),
                      "lbol_erg_s": 10.0 ** rng.uniform(40, 48, n), "min_bh_mass_msun": 10.0 ** rng.uniform(5, 12, n),
                      "pm_pvalue": 10.0 ** rng.uniform(-12, 0, n), "beyond_training": rng.uniform(size=n) < 0.5,
                      "z_source": rng.choice(["spec", "photo"], n)})
    assert all(io.text_writable(c) for c in table.columns)
    astropy_table = Table({name: np.asarray(table.column(name).to_pylist(), dtype=str) if name == "z_source"
                           else table.column(name).to_numpy(zero_copy_only=False) for name in table.column_names})
    for fmt, delimiter in (("ecsv", " "), ("csv", ",")):
        io.write_table_file(astropy_table, tmp_path / f"t.{fmt}", fmt)
        written = (tmp_path / f"t.{fmt}").read_bytes()
        body = io.text_body(table, delimiter)
        assert len(body.splitlines()) == n and written.endswith(body)
    assert not io.text_writable(pa.array([True, None]))


def test_temporary_files_get_free_names_beside_their_target(tmp_path):
    target = tmp_path / "sub" / "table.parquet"
    with io.DurableBatch() as batch:
        with batch.path(target) as first:
            first.write_text("a")
        # a leftover of a killed process that had this process's id and the next number: skipped, kept
        number = next(io._TMP_NUMBERS) + 1
        leftover = target.parent / f".{target.name}.{os.getpid()}-{number}.tmp"
        leftover.write_text("old")
        with batch.path(tmp_path / "sub" / "other.json") as second:
            second.write_text("b")
        assert first != second and leftover not in (first, second)
        assert first.name.startswith(".table.parquet.") and first.name.endswith(".tmp")
        assert first.parent == second.parent == target.parent
    assert target.read_text() == "a" and (tmp_path / "sub" / "other.json").read_text() == "b"
    assert leftover.read_text() == "old"
    assert oct(target.stat().st_mode & 0o777) == oct(0o666 & ~io._UMASK)
