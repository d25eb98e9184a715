"""bhgrow.output and the run-file writers: the fast ECSV writer gives astropy's bytes, the
threaded history writer gives the datasets HDF5 writes itself, and the figures look the same
with the shared mathtext parser.

References are the libraries' own writers: astropy's ECSV writer
(``Table.write(format="ascii.ecsv", delimiter=",")``) and h5py/HDF5 writing a dataset with
``create_dataset(data=..., compression="gzip", shuffle=True)``.
"""

from __future__ import annotations

import os
import zlib

import h5py
import numpy as np
import pytest
from astropy.table import Column, MaskedColumn, Table

from bhgrow import output, plots
from bhgrow.output import read_histories, write_ecsv, write_histories


# ------------------------------------------------------------------------------------------
# ECSV
def astropy_bytes(table, path) -> bytes:
    table.write(path, format="ascii.ecsv", delimiter=",", overwrite=True)
    return path.read_bytes()


def mixed_table(n: int = 3000, seed: int = 4) -> Table:
    """Every column kind the fast writer formats itself, with awkward values."""
    rng = np.random.default_rng(seed)
    special = np.array([0.0, -0.0, np.nan, np.inf, -np.inf, 1e16, 9999999999999998.0, 1e-4,
                        np.nextafter(1e-4, 0), 1e-5, 5e-324, 1.7976931348623157e308, 123.0,
                        0.1, 1 / 3, 2.0 ** 53, 1e22, -2.5e-300])
    bits = rng.integers(0, 2 ** 64, n, dtype=np.uint64, endpoint=False).view(np.float64)
    bits[: special.size] = special
    t = Table()
    t["id"] = np.arange(n, dtype=np.int64) * 7919 - 10 ** 12
    t["random_bits"] = bits
    t["random_bits"].unit = "solMass"
    t["random_bits"].description = "any float64 bit pattern"
    t["lognormal"] = rng.lognormal(0, 20, n)
    t["lognormal"].unit = "Mpc-3"
    # few distinct values (formatted once per bit pattern): 0.0 and -0.0, NaN, a constant
    t["few"] = rng.choice(np.array([0.0, -0.0, np.nan, 1e-6, 13.78, -1.5]), n)
    t["const"] = np.full(n, 1e-06)
    t["f32"] = rng.normal(0, 1e3, n).astype(np.float32)
    t["f16"] = rng.normal(0, 10, n).astype(np.float16)
    t["u8"] = rng.integers(0, 255, n).astype(np.uint8)
    t["u64"] = rng.integers(0, 2 ** 63, n, dtype=np.uint64) * 2
    t["flag"] = rng.random(n) < 0.5
    t["name"] = rng.choice(np.array(["light", "heavy", "Ω-seed", "über", "", "a b", "x\ty"]),
                           n)
    t["name"].description = "unicode, empty and inner blanks"
    t["f_fmt"] = rng.random(n)
    t["f_fmt"].info.format = ".3f"          # written in the header; ECSV ignores it for rows
    t.meta.update({"made_by": "test", "seed": 1, "list": [1.5, 2.5]})
    return t


def test_fast_ecsv_is_astropys_bytes(tmp_path):
    t = mixed_table()
    ref = astropy_bytes(t, tmp_path / "ref.ecsv")
    assert output._ecsv_fast_columns(t) is not None        # the fast path is taken
    for rows in (None, 1, 7, 2048, 2999, 3000, 10 ** 6):
        write_ecsv(t, tmp_path / "fast.ecsv", chunk_rows=rows)
        assert (tmp_path / "fast.ecsv").read_bytes() == ref, rows
    back = Table.read(tmp_path / "fast.ecsv")
    assert back.colnames == t.colnames and str(back["lognormal"].unit) == "1 / Mpc3"
    for name in t.colnames:
        if name != "name":          # (astropy reads an empty string back as masked)
            np.testing.assert_array_equal(np.asarray(back[name]), np.asarray(t[name]), name)


def test_fast_ecsv_empty_table_and_meta_argument(tmp_path):
    t = mixed_table()[:0]
    ref = astropy_bytes(t, tmp_path / "ref.ecsv")
    write_ecsv(t, tmp_path / "fast.ecsv")
    assert (tmp_path / "fast.ecsv").read_bytes() == ref
    t2 = mixed_table(50)
    write_ecsv(t2, tmp_path / "fast.ecsv", meta={"extra": "yes"}, chunk_rows=3)
    assert t2.meta["extra"] == "yes"
    assert (tmp_path / "fast.ecsv").read_bytes() == astropy_bytes(t2, tmp_path / "ref.ecsv")


def disk_table(t: Table, directory) -> output.DiskTable:
    d = output.DiskTable(directory, meta=t.meta)
    for name in t.colnames:
        col = t[name]
        d.add_column(np.asarray(col), name, unit=str(col.unit) if col.unit else None,
                     description=col.description)
    return d


def test_disk_table_ecsv_is_astropys_bytes(tmp_path):
    """A catalogue on disk (runs of several chunks) writes the file astropy writes for the
    same table, read a slice of rows at a time."""
    t = mixed_table()
    del t["f_fmt"]                      # (a display format is not a DiskTable's)
    d = disk_table(t, tmp_path / "d")
    ref = astropy_bytes(t, tmp_path / "ref.ecsv")
    for rows in (None, 1, 7, 2999, 3000, 10 ** 6):
        write_ecsv(d, tmp_path / "disk.ecsv", chunk_rows=rows)
        assert (tmp_path / "disk.ecsv").read_bytes() == ref, rows
    write_ecsv(d, tmp_path / "meta.ecsv", meta={"seed": 3})
    t.meta["seed"] = 3
    assert (tmp_path / "meta.ecsv").read_bytes() == astropy_bytes(t, tmp_path / "r2.ecsv")
    # a column the fast path leaves to astropy: the whole table, the same bytes
    q = Table({"a": np.arange(4), "s": np.array(["x", "y,z", "w", "v"])})
    write_ecsv(disk_table(q, tmp_path / "q"), tmp_path / "q.ecsv")
    assert (tmp_path / "q.ecsv").read_bytes() == astropy_bytes(q, tmp_path / "q_ref.ecsv")


def test_disk_table_columns_rows_and_removal(tmp_path):
    import gc

    t = mixed_table(50)
    d = disk_table(t, tmp_path / "d")
    assert len(d) == 50 and d.colnames == t.colnames
    for name in t.colnames:
        col = d[name]
        assert isinstance(col, Column) and col.name == name
        assert col.unit == t[name].unit and col.description == t[name].description
        np.testing.assert_array_equal(np.asarray(col), np.asarray(t[name]), name)
    part = d.rows(5, 17)
    whole = d.to_table()
    for name in t.colnames:
        np.testing.assert_array_equal(np.asarray(part[name]), np.asarray(t[name][5:17]))
        assert whole[name].unit == t[name].unit
        assert whole[name].description == t[name].description
    assert whole.meta == t.meta
    mask = np.asarray(t["flag"])
    np.testing.assert_array_equal(np.asarray(d[mask]["id"]), np.asarray(t["id"][mask]))
    with pytest.raises(KeyError):
        d["nope"]
    with pytest.raises(ValueError, match="exists"):
        d.add_column(np.zeros(50), "id")
    with pytest.raises(ValueError, match="50 rows"):
        d.add_column(np.zeros(49), "short")
    with pytest.raises(ValueError, match="1-d"):
        d.add_column(np.zeros((50, 2)), "wide")
    assert d.colnames == t.colnames               # nothing added by the refused columns
    assert d.keys() == t.colnames
    rows = list(d)                                # rows, as a Table's
    assert len(rows) == 50 and rows[3]["id"] == t["id"][3]
    import copy
    import pickle

    for c in (copy.copy(d), copy.deepcopy(d), pickle.loads(pickle.dumps(d))):
        assert isinstance(c, Table) and c.colnames == t.colnames   # a copy is the Table
        np.testing.assert_array_equal(np.asarray(c["lognormal"]), np.asarray(t["lognormal"]))
    assert output.DiskTable(tmp_path / "e").empty().colnames == []
    del d, part, whole
    gc.collect()
    assert not (tmp_path / "d").exists() and not (tmp_path / "e").exists()


@pytest.mark.parametrize("make", [
    lambda t: t.add_column(MaskedColumn([1.0, 2.0, 3.0], mask=[False, True, False]),
                           name="masked"),
    lambda t: t.add_column(Column(np.arange(6.0).reshape(3, 2)), name="vector"),
    lambda t: t.add_column(Column(np.array([{"a": 1}, None, [1, 2]], dtype=object)),
                           name="objects"),
    lambda t: t.add_column(Column(np.array([b"ab", b"c", b""])), name="bytes"),
    lambda t: t.add_column(Column(["a,b", "plain", "q\"uote"]), name="needs_quotes"),
    lambda t: t.add_column(Column(["line\nbreak", "x", "y"]), name="newline"),
    lambda t: t.add_column(Column([" lead", "trail\t", "ok"]), name="blanks"),
], ids=["masked", "multidim", "object", "bytes", "quotes", "newline", "blanks"])
def test_ecsv_columns_astropy_writes_itself(tmp_path, make):
    """Columns the fast path does not format: astropy writes the table (same bytes)."""
    t = Table({"x": [1.5, -0.0, np.nan], "k": np.array([1, 2, 3])})
    make(t)
    assert output._ecsv_fast_columns(t) is None
    write_ecsv(t, tmp_path / "fast.ecsv")
    assert (tmp_path / "fast.ecsv").read_bytes() == astropy_bytes(t, tmp_path / "ref.ecsv")


def test_ecsv_table_without_columns(tmp_path):
    t = Table(meta={"note": "nothing here"})
    assert output._ecsv_fast_columns(t) is None
    write_ecsv(t, tmp_path / "fast.ecsv")
    assert (tmp_path / "fast.ecsv").read_bytes() == astropy_bytes(t, tmp_path / "ref.ecsv")


def test_ecsv_single_empty_string_column(tmp_path):
    t = Table({"s": ["", "a", ""]})        # csv writes a lone empty field as ""
    write_ecsv(t, tmp_path / "fast.ecsv")
    assert (tmp_path / "fast.ecsv").read_bytes() == astropy_bytes(t, tmp_path / "ref.ecsv")


def test_ecsv_legacy_numpy_print_mode(tmp_path):
    """numpy's 1.13 print mode changes str() of float scalars; the file still follows it."""
    t = Table({"x": [1 / 3, 1e16, 0.1, 2.5e-7], "n": [1, 2, 3, 4]})
    with np.printoptions(legacy="1.13"):
        ref = astropy_bytes(t, tmp_path / "ref.ecsv")
        write_ecsv(t, tmp_path / "fast.ecsv")
    assert (tmp_path / "fast.ecsv").read_bytes() == ref
    assert b"\n0.333333333333,1\n" in ref     # the legacy text, not repr's 16 digits


@pytest.mark.parametrize("parts", [1, 3, 7])
def test_catalogue_slices_and_parts_are_astropys_bytes(tmp_path, parts):
    """write_run's catalogue writer (slices of rows, in parts joined afterwards) against
    astropy writing the table whole."""
    from bhgrow.output import EcsvFile

    t = mixed_table(100)
    f = EcsvFile(t, tmp_path / "rows.ecsv", meta={"seed": 3}, parts=parts, chunk_rows=11)
    for k in reversed(range(f.n_parts)):
        f.write_part(k)
    f.join()
    assert t.meta["seed"] == 3
    assert (tmp_path / "rows.ecsv").read_bytes() == astropy_bytes(t, tmp_path / "ref.ecsv")


# ------------------------------------------------------------------------------------------
# histories
def history_columns(n_bh: int = 700, seed: int = 2) -> dict:
    rng = np.random.default_rng(seed)
    rows = rng.integers(1, 40, n_bh)
    ids = np.repeat(np.arange(10, 10 + n_bh, dtype=np.int64) * 3, rows)
    n = ids.size
    return {"bh_id": ids, "t_gyr": np.tile(np.linspace(0.2, 13.8, 40), n_bh)[:n],
            "z": rng.choice(np.linspace(0, 20, 40), n),
            "mass_msun": rng.lognormal(10, 3, n),
            "mdot_msun_yr": np.where(rng.random(n) < 0.3, 0.0, rng.lognormal(-3, 2, n)),
            "eddington_ratio": rng.random(n).astype(np.float32),
            "host_gas_msun": rng.integers(0, 2 ** 62, n).view(np.float64),  # incompressible
            "flag": rng.random(n) < 0.1}                  # bool: written by HDF5 itself


def write_reference(cols: dict, path) -> None:
    """What write_histories wrote before its chunks were compressed in threads."""
    units = {"t_gyr": "Gyr", "mass_msun": "Msun", "mdot_msun_yr": "Msun/yr",
             "host_gas_msun": "Msun"}
    with h5py.File(path, "w") as h5:
        h5.attrs["format"] = "bhgrow-histories"
        h5.attrs["schema_version"] = 1
        for name, arr in cols.items():
            ds = h5.create_dataset(name, data=arr, compression="gzip", shuffle=True,
                                   compression_opts=output.HISTORIES_GZIP_LEVEL)
            ds.attrs["unit"] = units.get(name, "")
        uniq, start = np.unique(cols["bh_id"], return_index=True)
        g = h5.create_group("index")
        g.create_dataset("bh_id", data=uniq)
        g.create_dataset("offset", data=np.r_[start, cols["bh_id"].size].astype(np.int64))


def items(h5) -> dict:
    out = {}
    h5.visititems(lambda name, obj: out.__setitem__(name, obj))
    return out


def assert_same_histories(a_path, b_path, *, raw_chunks: bool) -> None:
    with h5py.File(a_path) as a, h5py.File(b_path) as b:
        assert {k: a.attrs[k] for k in a.attrs} == {k: b.attrs[k] for k in b.attrs}
        ia, ib = items(a), items(b)
        assert list(ia) == list(ib)
        for name, x in ia.items():
            y = ib[name]
            assert type(x) is type(y), name
            if isinstance(x, h5py.Group):
                continue
            assert (x.dtype, x.shape, x.chunks) == (y.dtype, y.shape, y.chunks), name
            assert x.id.get_create_plist() == y.id.get_create_plist(), name   # filters, fill
            assert dict(x.attrs) == dict(y.attrs), name
            assert x[()].tobytes() == y[()].tobytes(), name
            if raw_chunks and x.chunks:
                for i in range(x.id.get_num_chunks()):
                    offset = x.id.get_chunk_info(i).chunk_offset
                    assert x.id.read_direct_chunk(offset) == \
                        y.id.read_direct_chunk(offset), (name, i)


def hdf5_deflate_is_pythons(tmp_path) -> bool:
    """Whether HDF5's deflate filter gives the bytes of Python's zlib (same library)."""
    data = np.arange(5000, dtype=np.float64) ** 1.5
    with h5py.File(tmp_path / "probe.h5", "w") as h5:
        ds = h5.create_dataset("x", data=data, chunks=(5000,), compression="gzip",
                               shuffle=True, compression_opts=output.HISTORIES_GZIP_LEVEL)
        raw = ds.id.read_direct_chunk((0,))[1]
    return raw == zlib.compress(data.view(np.uint8).reshape(-1, 8).T.tobytes(),
                                output.HISTORIES_GZIP_LEVEL)


def same_raw_chunks(tmp_path) -> bool:
    """Whether bhgrow's stored chunks should be HDF5's own bytes: both deflate with zlib."""
    return output._deflater() is zlib.compress and hdf5_deflate_is_pythons(tmp_path)


@pytest.fixture(params=["installed", "zlib"])
def deflater(request, monkeypatch):
    """The deflater bhgrow finds (ISA-L's where the isal package imports) and Python's zlib
    (what it falls back to)."""
    if request.param == "zlib":
        monkeypatch.setattr(output, "_deflater", lambda: zlib.compress)
    return request.param


@pytest.mark.parametrize("threads", [1, 2, 5])   # 16 chunks a column; 5: window never full
def test_histories_same_datasets_as_hdf5_writes(tmp_path, threads, deflater):
    cols = history_columns()
    write_reference(cols, tmp_path / "ref.h5")
    with h5py.File(tmp_path / "ref.h5") as h5:      # a partial last chunk (padded)
        assert h5["mass_msun"].shape[0] % h5["mass_msun"].chunks[0] != 0
    write_histories(cols, tmp_path / "new.h5", threads=threads)
    assert_same_histories(tmp_path / "ref.h5", tmp_path / "new.h5",
                          raw_chunks=same_raw_chunks(tmp_path))
    back = read_histories(tmp_path / "new.h5")
    for k, v in cols.items():
        np.testing.assert_array_equal(back[k], v, k)


def test_histories_default_threads_and_empty(tmp_path):
    cols = history_columns(30)
    write_reference(cols, tmp_path / "ref.h5")
    write_histories(cols, tmp_path / "new.h5")
    assert_same_histories(tmp_path / "ref.h5", tmp_path / "new.h5", raw_chunks=False)
    empty = {k: v[:0] for k, v in cols.items()}
    write_reference(empty, tmp_path / "ref0.h5")
    write_histories(empty, tmp_path / "new0.h5")
    assert_same_histories(tmp_path / "ref0.h5", tmp_path / "new0.h5", raw_chunks=False)


def test_histories_chunks_are_zlib_streams_of_the_shuffled_rows(tmp_path, deflater):
    """Each stored chunk, inflated by Python's zlib (RFC 1950 reference implementation), is
    HDF5's shuffle of the chunk's rows, padded with the fill value 0 (the layout HDF5's
    filters define), whichever deflater wrote it."""
    cols = history_columns()
    write_histories(cols, tmp_path / "h.h5", threads=2)
    with h5py.File(tmp_path / "h.h5") as h5:
        for name in output.HISTORY_COLUMNS:
            ds, arr = h5[name], cols[name]
            size, item = ds.chunks[0], arr.dtype.itemsize
            assert ds.compression == "gzip" and ds.shuffle, name
            assert ds.compression_opts == output.HISTORIES_GZIP_LEVEL, name
            for i in range(ds.id.get_num_chunks()):
                start = ds.id.get_chunk_info(i).chunk_offset[0]
                part = np.zeros(size, arr.dtype)
                rows = arr[start:start + size]
                part[:rows.size] = rows
                want = part.view(np.uint8).reshape(size, item).T.tobytes()
                assert zlib.decompress(ds.id.read_direct_chunk((start,))[1]) == want, (name, i)


def test_deflater_falls_back_to_zlib_without_isal(monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "isal", None)       # import isal -> ImportError
    assert output._deflater() is zlib.compress


def test_histories_compression_error_leaves_no_thread_running(tmp_path, monkeypatch):
    import threading

    def broken(data, level):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(output, "_deflater", lambda: broken)
    before = threading.active_count()
    with pytest.raises(RuntimeError, match="disk on fire"):
        write_histories(history_columns(50), tmp_path / "h.h5", threads=2)
    assert threading.active_count() == before


# ------------------------------------------------------------------------------------------
# figures
def png_pixels(path) -> np.ndarray:
    from PIL import Image

    with Image.open(path) as im:
        return np.asarray(im.convert("RGBA"))


def draw_histogram(path):
    lo = np.arange(-3, 6, 0.5)
    return plots.histogram(lo, lo + 0.5, {"a": np.exp(-lo ** 2) * 1e-3,
                                          "b": np.exp(-lo) * 1e-5},
                           path, xlabel=r"log$_{10}$ M$_c$ [M$_\odot$]",
                           ylabel=r"mergers [Mpc$^{-3}$ dex$^{-1}$]", vline=1.0,
                           vlabel="threshold", title="test")


def test_shared_mathtext_parser_changes_no_pixel(tmp_path, monkeypatch):
    """Figures drawn with the parser shared between figures (cache warm from an earlier
    figure) are pixel for pixel those drawn with each renderer's own parser."""
    draw_histogram(tmp_path / "warm.png")
    draw_histogram(tmp_path / "shared.png")
    monkeypatch.setattr(plots, "_shared_mathtext", lambda fig: None)
    draw_histogram(tmp_path / "own.png")
    shared, own = png_pixels(tmp_path / "shared.png"), png_pixels(tmp_path / "own.png")
    assert shared.shape == own.shape == (round(4.4 * plots.DPI), round(6.4 * plots.DPI), 4)
    np.testing.assert_array_equal(shared, own)
    assert not list(tmp_path.glob(".*.tmp-*"))


# ------------------------------------------------------------------ histories kept on disk
def store_columns(n_bh: int = 700, seed: int = 3) -> dict:
    """History columns of the run's layout (sorted by bh_id), with float32 in one column."""
    cols = history_columns(n_bh, seed)
    return {k: cols[k] for k in output.HISTORY_COLUMNS}


def split_by_black_hole(cols: dict, n_parts: int, seed: int = 5) -> list:
    """The rows of ``cols`` in ``n_parts`` parts of whole black holes, their ids
    interleaved between parts (as chunks of a file not ordered by node id give them)."""
    ids = cols["bh_id"]
    uniq = np.unique(ids)
    owner = dict(zip(uniq.tolist(), np.random.default_rng(seed).integers(0, n_parts,
                                                                         uniq.size).tolist()))
    part = np.array([owner[i] for i in ids.tolist()])
    return [{k: v[part == p] for k, v in cols.items()} for p in range(n_parts)]


@pytest.mark.parametrize("block_rows", [1, 37, 100_000])
def test_history_store_gives_the_columns_and_file_of_one_write(tmp_path, monkeypatch,
                                                               block_rows):
    # the rows of several chunks, moved to disk part by part, come back in the run's order
    # and make the same histories file, chunk for chunk, as the columns in memory; blocks
    # smaller than an HDF5 chunk (1, 37) carry rows over, 100000 holds the whole column
    monkeypatch.setattr(output, "HISTORY_BLOCK_ROWS", block_rows)
    cols = store_columns()
    store = output.HistoryStore(tmp_path / "store")
    for part in split_by_black_hole(cols, 4):
        store.add(part)
    store.add({k: v[:0] for k, v in cols.items()})          # a chunk without black holes
    assert store.n_rows == cols["bh_id"].size
    assert list(store) == list(output.HISTORY_COLUMNS)
    for k, v in cols.items():
        got = store[k]
        assert got.dtype == v.dtype, k
        np.testing.assert_array_equal(got, v, k)
    write_histories(cols, tmp_path / "memory.h5", threads=2)
    write_histories(store, tmp_path / "store.h5", threads=2)
    assert_same_histories(tmp_path / "memory.h5", tmp_path / "store.h5", raw_chunks=True)
    with h5py.File(tmp_path / "store.h5") as h5:
        assert h5["mass_msun"].shape[0] > 3 * h5["mass_msun"].chunks[0]   # several chunks


def test_history_store_most_massive_are_the_figures_black_holes(tmp_path):
    cols = store_columns(300)
    store = output.HistoryStore(tmp_path / "store")
    for part in split_by_black_hole(cols, 3):
        store.add(part)
    ids = cols["bh_id"]
    uniq, start = np.unique(ids, return_index=True)
    last = cols["mass_msun"][np.r_[start[1:], ids.size] - 1]
    top = uniq[np.argsort(last)[::-1][:7]]
    got = store.most_massive(7)
    keep = np.isin(ids, top)
    for k, v in cols.items():
        np.testing.assert_array_equal(got[k], v[keep], k)


def test_history_store_empty_and_removed_when_dropped(tmp_path):
    import gc

    cols = {k: v[:0] for k, v in store_columns(5).items()}
    store = output.HistoryStore(tmp_path / "store")
    store.add(cols)
    write_histories(store, tmp_path / "store.h5")
    write_reference({k: np.zeros(0) for k in cols}, tmp_path / "ref.h5")
    assert_same_histories(tmp_path / "ref.h5", tmp_path / "store.h5", raw_chunks=False)
    store.add(store_columns(5))
    assert (tmp_path / "store").is_dir()
    del store
    gc.collect()
    assert not (tmp_path / "store").exists()


def test_history_store_rows_at_chosen_snapshots(tmp_path):
    # what the tables read: the rows of a few snapshots, in the run's order, the same as
    # filtering the columns in memory
    cols = store_columns(400, seed=8)
    store = output.HistoryStore(tmp_path / "store")
    for part in split_by_black_hole(cols, 3, seed=9):
        store.add(part)
    np.testing.assert_array_equal(store.snapshot_z(), np.unique(cols["z"]))
    chosen = np.unique(cols["z"])[[0, 7, 21]]
    got = store.at_redshifts(chosen, ("bh_id", "z", "mass_msun"))
    keep = np.isin(cols["z"], chosen)
    assert 0 < keep.sum() < keep.size
    for k in ("bh_id", "z", "mass_msun"):
        np.testing.assert_array_equal(got[k], cols[k][keep], k)
    none = store.at_redshifts([-1.0], ("bh_id", "eddington_ratio"))
    assert none["bh_id"].size == 0 and none["eddington_ratio"].dtype == np.float32


@pytest.mark.parametrize("block_rows", [37, 100_000])
def test_history_file_reads_what_the_products_use(tmp_path, monkeypatch, block_rows):
    # histories.h5 read in blocks (bhgrow tables RUN_DIR): the rows of chosen snapshots,
    # the figure's black holes and whole columns, as from the columns in memory
    monkeypatch.setattr(output, "HISTORY_BLOCK_ROWS", block_rows)
    cols = store_columns(300, seed=4)
    write_histories(cols, tmp_path / "h.h5", threads=1)
    f = output.HistoryFile(tmp_path / "h.h5")
    assert f.n_rows == cols["bh_id"].size and list(f) == list(output.HISTORY_COLUMNS)
    np.testing.assert_array_equal(f.snapshot_z(), np.unique(cols["z"]))
    chosen = np.unique(cols["z"])[[2, 30]]
    keep = np.isin(cols["z"], chosen)
    got = f.at_redshifts(chosen, ("bh_id", "eddington_ratio"))
    for k in ("bh_id", "eddington_ratio"):
        np.testing.assert_array_equal(got[k], cols[k][keep], k)
    store = output.HistoryStore(tmp_path / "store")
    store.add(cols)
    top_store, top_file = store.most_massive(5), f.most_massive(5)
    for k, v in cols.items():
        np.testing.assert_array_equal(top_file[k], top_store[k], k)
        np.testing.assert_array_equal(f[k], v, k)


def test_history_file_bad_input(tmp_path):
    from bhgrow.errors import BhgrowInputError

    with pytest.raises(BhgrowInputError, match="missing") as exc:
        output.HistoryFile(tmp_path / "none.h5")
    assert exc.value.rule == "no_file"
    (tmp_path / "text.h5").write_text("not hdf5\n")
    with pytest.raises(BhgrowInputError, match="not a readable HDF5 file"):
        output.HistoryFile(tmp_path / "text.h5")
    cols = store_columns(20)
    write_histories(cols, tmp_path / "h.h5", threads=1)
    with h5py.File(tmp_path / "h.h5", "a") as h5:
        del h5["z"]
    with pytest.raises(BhgrowInputError, match=r"h\.h5: missing dataset\(s\) z"):
        output.HistoryFile(tmp_path / "h.h5")
    with h5py.File(tmp_path / "h.h5", "a") as h5:
        h5["z"] = np.zeros(3)
    with pytest.raises(BhgrowInputError, match="datasets differ in length"):
        output.HistoryFile(tmp_path / "h.h5")


@pytest.mark.skipif(not hasattr(os, "fork"), reason="fork")
def test_figures_drawn_here_and_in_a_forked_process_at_once(tmp_path):
    """A process that has drawn figures forks one that draws at the same time (as the
    writing tasks of a run with several workers do): both finish, with the same pixels as a
    figure drawn alone. Each process needs its own FreeType fonts (their open files' read
    offsets are shared across a fork); with the shared mathtext parser inherited, this
    failed with FreeType's "too many hints"."""
    lo = np.arange(-3, 6.5, 0.25)
    counts = {"mergers": np.arange(lo.size) % 7}
    labels = dict(xlabel=r"log$_{10}$ sky-averaged LISA SNR", ylabel="mergers",
                  title=r"$\mathdefault{10^{-4}}$ to $M_\odot$")
    plots.histogram(lo, lo + 0.25, counts, tmp_path / "alone.png", **labels)
    pid = os.fork()
    if pid == 0:                                   # the child: its figures, then its verdict
        code = 1
        try:
            for i in range(6):
                plots.histogram(lo, lo + 0.25, counts, tmp_path / f"child{i}.png", **labels)
            code = 0
        except BaseException:
            import traceback

            traceback.print_exc()                 # shown by pytest (captured stderr)
        finally:
            os._exit(code)
    import signal
    import time

    try:
        for i in range(6):
            plots.histogram(lo, lo + 0.25, counts, tmp_path / f"here{i}.png", **labels)
    finally:
        deadline = time.monotonic() + 60
        while (done := os.waitpid(pid, os.WNOHANG))[0] == 0 and time.monotonic() < deadline:
            time.sleep(0.05)
        if done[0] == 0:                           # hung: stop it, then fail
            os.kill(pid, signal.SIGKILL)
            os.waitpid(pid, 0)
    assert done[0] == pid and done[1] == 0, "the forked process failed or hung"
    want = png_pixels(tmp_path / "alone.png")
    for i in range(6):
        for who in ("child", "here"):
            np.testing.assert_array_equal(png_pixels(tmp_path / f"{who}{i}.png"), want)
