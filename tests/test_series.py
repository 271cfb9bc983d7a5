"""timeseries.nc written as the run goes: the same file xarray writes, whole or absent.

The reference is xarray's own NetCDF writer (``Dataset.to_netcdf`` with the h5netcdf engine)
applied to the finished trajectory with the CF attributes of the output contract; the file
streamed block by block must read back identical to it (``xarray.testing.assert_identical``).
"""

import os
import stat

import numpy as np
import pytest
import xarray as xr

import trophoscape as ts
from trophoscape.errors import RunError
from trophoscape.io.series import SERIES_BLOCK_ROWS
from trophoscape.model.system import SPECIES

from conftest import grid_study, write_grid_file


@pytest.fixture(scope="module")
def grid_file(tmp_path_factory):
    return write_grid_file(tmp_path_factory.mktemp("grid"))


def study_of(path, **sections):
    run = dict(sections.pop("run", {}))
    return grid_study(path, duration=run.pop("duration", 80.0), run=run, **sections)


def reference_file(result, path, like):
    """The finished trajectory written in one go by xarray, in the layout of ``like`` (its
    patch ids, polygons, CRS and time axis, which tests/test_netcdf_cf.py checks against the
    CF checker, cfdm and GDAL): the census times and the two series come from the
    trajectory, with the contract's attributes (consistency test of the block writer)."""
    data = result.trajectory.data
    with xr.open_dataset(like, engine="h5netcdf", decode_times=False) as ds:
        ref = ds.drop_vars(list(SPECIES)).load()
    np.testing.assert_array_equal(ref["model_time"].values, data["time"].values)
    for s in SPECIES:
        ref[s] = (data[s].dims, data[s].values.astype("float32"),
                  {"units": "1", "long_name": f"{s} abundance (individuals)",
                   "geometry": "patch_geometry", "grid_mapping": "crs",
                   "cell_methods": "time: point area: sum"})
    ref.to_netcdf(path, engine="h5netcdf")
    return path


def assert_same_file(got, want):
    with xr.open_dataset(got, engine="h5netcdf") as a, xr.open_dataset(want,
                                                                       engine="h5netcdf") as b:
        xr.testing.assert_identical(a.load(), b.load())
        for s in SPECIES:
            assert a[s].dtype == np.float32
            assert a[s].encoding["zlib"] or a[s].encoding.get("compression") == "gzip"
            assert a[s].encoding["shuffle"]


def test_streamed_file_equals_xarrays_and_arrives_in_blocks(grid_file, tmp_path, monkeypatch):
    study = study_of(grid_file)
    seen = []
    from trophoscape.io import series

    original = series.SeriesWriter.write

    def spy(self, start, blocks):
        # the file is being filled while the run goes: rows so far, before the run ends
        seen.append((start, np.shape(blocks[0])[0], self._tmp.exists(), self.path.exists()))
        return original(self, start, blocks)

    monkeypatch.setattr(series.SeriesWriter, "write", spy)
    target = tmp_path / "series.nc"
    result = ts.run_study(study, series_to=target)
    n_times = result.trajectory.data.sizes["time"]
    assert n_times == 161
    # blocks of 64 census rows, in order, then the last 33; all while the name is temporary
    assert [(s, r) for s, r, _, _ in seen] == [(0, 64), (64, 64), (128, 33)]
    assert all(tmp and not final for _, _, tmp, final in seen)
    assert result.series_file == target and target.exists()
    # the permissions of any file the user writes, not the private ones of a temporary file
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~umask
    assert not list(tmp_path.glob(".series.nc.partial-*"))
    assert_same_file(target, reference_file(result, tmp_path / "reference.nc", target))
    # write_run takes the streamed file as it is
    out = ts.write_run(result, tmp_path / "out")
    assert (out / "timeseries.nc").read_bytes() == target.read_bytes()


def test_file_written_from_memory_equals_xarrays(grid_file, tmp_path):
    result = ts.run_study(study_of(grid_file))
    assert result.series_file is None
    out = ts.write_run(result, tmp_path / "out")
    assert_same_file(out / "timeseries.nc",
                     reference_file(result, tmp_path / "reference.nc", out / "timeseries.nc"))


@pytest.mark.parametrize("stacked", [True, False])
def test_replicates_streamed_or_written_at_the_end(grid_file, tmp_path, stacked):
    study = study_of(grid_file, run={"replicates": 3, "seed": 7, "duration": 40.0},
                     noise={"environmental_sd": 0.3, "correlation_km": 3.0})
    target = tmp_path / "series.nc"
    result = ts.run_study(study, stacked=stacked, series_to=target)
    assert result.trajectory.data["prey"].dims == ("time", "patch", "replicate")
    assert_same_file(target, reference_file(result, tmp_path / "reference.nc", target))


def test_demographic_run_written_at_the_end(grid_file, tmp_path):
    study = study_of(grid_file, run={"replicates": 2, "seed": 3, "duration": 6.0},
                     noise={"demographic": True})
    target = tmp_path / "series.nc"
    result = ts.run_study(study, series_to=target)
    assert_same_file(target, reference_file(result, tmp_path / "reference.nc", target))


def test_failed_run_leaves_no_series_file(grid_file, tmp_path):
    # exponential prey with no predator grows past what float32 stores: the run fails
    study = study_of(grid_file, prey={"growth": "exponential", "growth_rate": 3.0},
                     predator={"initial_density": 0.0})
    target = tmp_path / "series.nc"
    with pytest.raises(RunError):
        ts.run_study(study, series_to=target)
    assert list(tmp_path.iterdir()) == []


def test_block_rows_match_the_netcdf_chunks(grid_file, tmp_path):
    # one block of census rows fills whole chunks along time, so no chunk is written twice
    result = ts.run_study(study_of(grid_file), series_to=tmp_path / "s.nc")
    with xr.open_dataset(result.series_file, engine="h5netcdf") as ds:
        assert ds["prey"].encoding["chunksizes"][0] == SERIES_BLOCK_ROWS


@pytest.mark.parametrize("limits", [(64, 4096, 16), (8, 7, 2)])
def test_chunks_encoded_here_read_as_hdf5s_filters_write_them(grid_file, tmp_path, monkeypatch,
                                                              limits):
    # consistency test against HDF5's own filter pipeline (h5py): whole chunks along time
    # are shuffled and deflated here, on threads, and written as they are; the file must
    # hold the values HDF5's filters store, with the filters HDF5 reads them by (shuffle,
    # then deflate at level 4), for chunks cut at every edge (small limits: many chunks
    # along patches and replicates), in one thread or two (the same bytes); blocks that do
    # not start on a chunk go through HDF5's filters
    import h5py

    from trophoscape import machine
    from trophoscape.io import series

    monkeypatch.setattr(series, "_CHUNK_LIMITS", limits)
    study = study_of(grid_file, run={"replicates": 3, "seed": 7, "duration": 30.0},
                     noise={"environmental_sd": 0.3, "correlation_km": 3.0})
    result = ts.run_study(study)
    data = result.trajectory.data
    seeds = data["seed"].values
    values = [data[s].values.astype(np.float32) for s in SPECIES]
    encoded = []
    encode = series._encoded_chunk

    def counted(*args):
        encoded.append(args[1])
        return encode(*args)

    monkeypatch.setattr(series, "_encoded_chunk", counted)

    def written(path, rows, threads):
        monkeypatch.setattr(machine, "cores", lambda: threads)
        with series.SeriesWriter(path, study=result.study, times=data["time"].values,
                                 seeds=seeds) as writer:
            for start in range(0, values[0].shape[0], rows):
                writer.write(start, [v[start:start + rows] for v in values])
        return path

    one = written(tmp_path / "one.nc", 2 * limits[0], 1)
    assert encoded, "no chunk was encoded here"
    two = written(tmp_path / "two.nc", 2 * limits[0], 2)
    assert one.read_bytes() == two.read_bytes()
    count = len(encoded)
    odd = written(tmp_path / "odd.nc", limits[0] + 3, 2)  # starts off the chunks
    assert len(encoded) - count < count  # some blocks through HDF5's filters
    for path in (one, odd):
        with h5py.File(path, "r") as f:
            for s, want in zip(SPECIES, values):
                ds = f[s]
                np.testing.assert_array_equal(ds[...], want)
                pipeline = ds.id.get_create_plist()
                filters = [pipeline.get_filter(i)[0] for i in range(pipeline.get_nfilters())]
                assert filters == [h5py.h5z.FILTER_SHUFFLE, h5py.h5z.FILTER_DEFLATE]
                assert pipeline.get_filter(1)[2] == (4,)
        assert_same_file(path, one)



def test_each_chunk_is_the_one_hdf5s_filters_store_and_netcdf_reads_it(grid_file, tmp_path,
                                                                        monkeypatch):
    # against HDF5's own filter pipeline (h5py/HDF5 as the reference): every chunk written
    # here, read back raw (read_direct_chunk) and inflated, holds the bytes of the chunk
    # HDF5's shuffle and deflate filters store for the same rows (edge chunks padded the
    # same way), with no filter skipped (mask 0); the netCDF-C library (netCDF4) reads the
    # values and names the filters (shuffle, then zlib level 4)
    import itertools
    import zlib

    import h5py

    from trophoscape.io import series

    monkeypatch.setattr(series, "_CHUNK_LIMITS", (8, 7, 2))
    study = study_of(grid_file, run={"duration": 30.0})
    result = ts.run_study(study)
    data = result.trajectory.data
    values = [data[s].values.astype(np.float32) for s in SPECIES]

    def written(path):
        with series.SeriesWriter(path, study=result.study, times=data["time"].values) as w:
            w.write(0, values)
        return path

    here = written(tmp_path / "here.nc")
    monkeypatch.setattr(series, "_direct_dataset", lambda var: None)
    hdf5 = written(tmp_path / "hdf5.nc")
    with h5py.File(here, "r") as a, h5py.File(hdf5, "r") as b:
        for s in SPECIES:
            shape, chunks = a[s].shape, a[s].chunks
            assert shape[0] % chunks[0] and shape[1] % chunks[1]  # edge chunks both ways
            for origin in itertools.product(*(range(0, n, c) for n, c in zip(shape, chunks))):
                mask_a, raw_a = a[s].id.read_direct_chunk(origin)
                mask_b, raw_b = b[s].id.read_direct_chunk(origin)
                assert mask_a == mask_b == 0
                assert zlib.decompress(raw_a) == zlib.decompress(raw_b)
    netcdf4 = pytest.importorskip("netCDF4")
    with netcdf4.Dataset(here) as ds:
        for s, want in zip(SPECIES, values):
            np.testing.assert_array_equal(np.ma.filled(ds[s][:], np.nan), want)
            filters = ds[s].filters()
            assert filters["shuffle"] and filters["zlib"] and filters["complevel"] == 4


def test_blocks_that_do_not_fit_the_file_are_refused(grid_file, tmp_path):
    # a block with a patch too few or too many, rows past the end, or species of two
    # shapes: refused, as HDF5's own write refused them, not cut or padded into the file
    from trophoscape.io import series

    result = ts.run_study(study_of(grid_file, run={"duration": 10.0}))
    data = result.trajectory.data
    values = [data[s].values.astype(np.float32) for s in SPECIES]
    times = data["time"].values
    with series.SeriesWriter(tmp_path / "s.nc", study=result.study, times=times) as writer:
        for bad in ([v[:, :-1] for v in values], [np.pad(v, ((0, 0), (0, 1))) for v in values],
                    [values[0], values[1][:-1]]):
            with pytest.raises(ValueError, match="do not fit"):
                writer.write(0, bad)
        with pytest.raises(ValueError, match="do not fit"):
            writer.write(8, values)
        assert writer.rows_written == 0
        writer.write(0, values)
