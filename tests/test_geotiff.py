"""COG writing: tiles, overviews and TIFF layout, checked by GDAL (rasterio) and rio-cogeo's validator."""
import numpy as np
import pytest
import rasterio
from rasterio.io import MemoryFile

from agegrid.grid import GridSpec
from agegrid.io import geotiff, tiff
from agegrid.io.geotiff import COPIED_TAGS, GDAL_METADATA, GDAL_NODATA, CogWriter, georeferencing_tags

REGION, SPACING = (10.0, 30.0, -5.0, 12.0), 0.03  # 567 x 667 cells: two overview levels, ragged edge tiles


def layers(shape, seed=5):
    """A real layer with a NaN hole and a code layer, both with structure a codec can find."""
    rng = np.random.default_rng(seed)
    age = np.cumsum(rng.uniform(0, 0.1, shape), axis=1).astype(np.float32)
    age[40:130, 200:333] = np.nan
    age[7, 5] = np.nan
    flag = rng.integers(1, 6, shape).astype(np.int8)
    return {"age": age, "age_flag": flag}


def write_cogs(tmp_path, block, compression="deflate", predictor=False, tag="", chunk=256):
    spec = GridSpec(REGION, SPACING, chunk=chunk)
    values = layers(spec.shape)
    targets = {n: tmp_path / f"{n}{tag}.tif" for n in values}
    attrs = {"age": {"long_name": "crustal age", "units": "Myr"},
             "age_flag": {"long_name": "how the age was found", "units": "1"}}
    writer = CogWriter(spec, targets, attrs, {n: v.dtype for n, v in values.items()},
                       {"age": np.float32(np.nan), "age_flag": np.int8(-128)}, compression, predictor)
    rows, cols = block
    ny, nx = spec.shape
    for r0 in range(0, ny, rows):
        for c0 in range(0, nx, cols):
            for name, v in values.items():
                writer.write(name, r0, c0, v[r0:r0 + rows, c0:c0 + cols])
    staged = writer.finish()
    return {n: staged[t] for n, t in targets.items()}, values


def reference_reduction(values: np.ndarray, averaged: bool) -> np.ndarray:
    """One overview level computed independently: numpy's nanmean of each 2 x 2 group (ragged edges padded
    with NaN), or the group's top-left cell for codes."""
    if not averaged:
        return values[::2, ::2]
    ny, nx = values.shape
    padded = np.full((ny + ny % 2, nx + nx % 2), np.nan)
    padded[:ny, :nx] = values
    with np.errstate(invalid="ignore"), pytest.warns(RuntimeWarning):  # all-NaN groups stay NaN
        return np.nanmean(padded.reshape(padded.shape[0] // 2, 2, -1, 2), axis=(1, 3))


def test_overviews_read_by_gdal_are_means_of_valid_cells(tmp_path):
    from rio_cogeo.cogeo import cog_validate

    paths, values = write_cogs(tmp_path, (256, 256))
    for name, averaged in (("age", True), ("age_flag", False)):
        valid, errors, warnings = cog_validate(str(paths[name]), quiet=True)
        assert valid and not warnings, (errors, warnings)
        expect = values[name].astype(np.float64)
        with rasterio.open(paths[name]) as src:
            assert src.overviews(1) == [2, 4]  # halved until one tile holds the overview
            assert np.array_equal(src.read(1), values[name], equal_nan=True)
        for level in range(2):
            expect = reference_reduction(expect, averaged)
            with rasterio.open(paths[name], OVERVIEW_LEVEL=level) as ovr:
                got = ovr.read(1).astype(np.float64)
            assert got.shape == expect.shape
            if averaged:
                assert np.array_equal(np.isnan(got), np.isnan(expect))
                assert np.allclose(got, expect, rtol=1e-6, equal_nan=True)
            else:
                assert np.array_equal(got, expect)


@pytest.mark.parametrize("chunk, side", [(512, 512), (1024, 512), (768, 256), (300, 256)])
def test_tiles_are_the_largest_side_that_divides_the_grid_blocks(tmp_path, chunk, side):
    from rio_cogeo.cogeo import cog_validate

    paths, values = write_cogs(tmp_path, (chunk, chunk), chunk=chunk)
    valid, errors, warnings = cog_validate(str(paths["age"]), quiet=True)
    assert valid and not warnings, (errors, warnings)
    with rasterio.open(paths["age"]) as src:  # GDAL's view of the tiling
        assert src.block_shapes == [(side, side)]
        assert src.overviews(1) == ([2] if side == 512 else [2, 4])  # halved until one tile holds it
        assert np.array_equal(src.read(1), values["age"], equal_nan=True)


def test_wide_grids_get_smaller_tiles():
    # a row of unfinished overview tiles spans the grid: past 16,384 cells of width, 256-cell tiles halve it
    from agegrid.grid import GridSpec
    from agegrid.io.geotiff import tile_side

    assert tile_side(GridSpec((-180.0, 180.0, -90.0, 90.0), 1 / 30, chunk=512)) == 512  # 10,800 wide
    assert tile_side(GridSpec((-180.0, 180.0, -90.0, 90.0), 1 / 60, chunk=512)) == 256  # 21,600 wide
    assert tile_side(GridSpec((-180.0, 180.0, -90.0, 90.0), 1 / 60, chunk=768)) == 256


def test_file_does_not_depend_on_how_the_layer_arrived(tmp_path):
    """Blocks smaller than a tile and straddling tile edges give the same bytes as whole-tile blocks."""
    whole, _ = write_cogs(tmp_path, (256, 512), "zstd", True, tag="_whole")
    ragged, _ = write_cogs(tmp_path, (100, 70), "zstd", True, tag="_ragged")
    for name in whole:
        assert whole[name].read_bytes() == ragged[name].read_bytes()


def test_band_metadata_and_georeferencing_as_gdal_writes_them(tmp_path):
    paths, _ = write_cogs(tmp_path, (256, 256))
    spec = GridSpec(REGION, SPACING, chunk=256)
    with rasterio.open(paths["age"]) as src:
        assert src.crs.to_epsg() == 4326
        assert src.transform.almost_equals(spec.transform)
        assert np.isnan(src.nodata)
        assert src.descriptions == ("crustal age",) and src.units == ("Myr",)
        assert src.tags(1)["units"] == "Myr"
    with rasterio.open(paths["age_flag"]) as src:
        assert src.nodata == -128 and src.dtypes == ("int8",)


def test_no_spill_files_are_left(tmp_path):
    staged, _ = write_cogs(tmp_path, (256, 256))
    spec = GridSpec(REGION, SPACING, chunk=256)
    writer = CogWriter(spec, {"age": tmp_path / "left.tif"}, {"age": {"units": "Myr"}}, {"age": np.float32},
                       {"age": np.float32(np.nan)})
    writer.write("age", 0, 0, np.zeros((256, 256), np.float32))
    writer.close()  # a build that failed half-way
    assert sorted(tmp_path.iterdir()) == sorted(staged.values())


@pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")
def test_read_tags_of_a_gdal_geotiff():
    with MemoryFile() as memory:
        with memory.open(driver="GTiff", width=3, height=2, count=1, dtype="int16") as band:
            band.write(np.arange(6, dtype=np.int16).reshape(2, 3), 1)
        tags = tiff.read_tags(memory.read())
    # TIFF 6.0: ImageWidth 256, ImageLength 257, BitsPerSample 258, SampleFormat 339 (2 = signed integer)
    assert np.frombuffer(tags[tiff.IMAGE_WIDTH].raw, "<u2")[0] == 3
    assert np.frombuffer(tags[tiff.IMAGE_LENGTH].raw, "<u2")[0] == 2
    assert np.frombuffer(tags[tiff.BITS_PER_SAMPLE].raw, "<u2")[0] == 16
    assert np.frombuffer(tags[tiff.SAMPLE_FORMAT].raw, "<u2")[0] == 2
    with pytest.raises(ValueError):
        tiff.read_tags(b"MM\x00*\x00\x00\x00\x08")


def raw_pyramid(folder, order=None):
    """A two-level pyramid of raw 256 x 256 uint16 tiles in spill files (full resolution's tiles in ``order``,
    row order by default), with the image and its overview."""
    folder.mkdir(exist_ok=True)
    image = np.arange(300 * 520, dtype=np.uint16).reshape(300, 520)
    overview = image[::2, ::2]
    levels = []
    for index, values in enumerate((image, overview)):
        ny, nx = values.shape
        spill = folder / f"level{index}.tiles"
        grid = [(ti, tj) for ti in range(-(-ny // 256)) for tj in range(-(-nx // 256))]
        offsets, counts = np.zeros(len(grid), np.int64), np.zeros(len(grid), np.int64)
        with open(spill, "wb") as fh:
            for k in (order if order is not None and index == 0 else range(len(grid))):
                ti, tj = grid[k]
                tile = np.zeros((256, 256), np.uint16)
                part = values[ti * 256:(ti + 1) * 256, tj * 256:(tj + 1) * 256]
                tile[:part.shape[0], :part.shape[1]] = part
                offsets[k] = fh.tell()
                counts[k] = fh.write(tile.tobytes())
        S, L = tiff.SHORT, tiff.LONG
        tags = {tiff.IMAGE_WIDTH: tiff.Tag.of(L, nx), tiff.IMAGE_LENGTH: tiff.Tag.of(L, ny),
                tiff.BITS_PER_SAMPLE: tiff.Tag.of(S, 16), tiff.COMPRESSION: tiff.Tag.of(S, 1),
                tiff.PHOTOMETRIC: tiff.Tag.of(S, 1), tiff.SAMPLES_PER_PIXEL: tiff.Tag.of(S, 1),
                tiff.TILE_WIDTH: tiff.Tag.of(S, 256), tiff.TILE_LENGTH: tiff.Tag.of(S, 256),
                tiff.SAMPLE_FORMAT: tiff.Tag.of(S, 1)}
        if index:
            tags[tiff.NEW_SUBFILE_TYPE] = tiff.Tag.of(L, 1)
        levels.append(tiff.Level(tags, spill, offsets, counts))
    return levels, image, overview


@pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")
@pytest.mark.parametrize("bigtiff", [False, True])
def test_pyramid_layout_classic_and_bigtiff(tmp_path, bigtiff):
    """A two-level pyramid of raw tiles, classic TIFF and BigTIFF (header version 42 and 43, TIFF 6.0 and the
    BigTIFF proposal, from memory): GDAL reads both, and rio-cogeo finds the IFDs before the data."""
    from rio_cogeo.cogeo import cog_validate

    levels, image, overview = raw_pyramid(tmp_path)
    target = tmp_path / "pyramid.tif"
    tiff.write_pyramid(target, levels, bigtiff=bigtiff)
    assert target.read_bytes()[2] == (43 if bigtiff else 42)
    valid, errors, _ = cog_validate(str(target), quiet=True)
    assert valid, errors
    with rasterio.open(target) as src:
        assert np.array_equal(src.read(1), image)
    with rasterio.open(target, OVERVIEW_LEVEL=0) as ovr:
        assert np.array_equal(ovr.read(1), overview)


@pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")
def test_full_resolution_inserted_behind_or_copied_gives_the_same_bytes(tmp_path, monkeypatch):
    """In place (fallocate's insert-range, where the file system has it), copied (forced), and copied because
    the tiles were stored out of order: the same file, read by GDAL, its full resolution on a 4 KiB boundary."""
    from rio_cogeo.cogeo import cog_validate

    levels, image, _ = raw_pyramid(tmp_path / "in_place")
    in_place = tmp_path / "in_place.tif"
    tiff.write_pyramid(in_place, levels)
    stayed = levels[0].spill.exists()
    copied_levels, _, _ = raw_pyramid(tmp_path / "copied")
    with monkeypatch.context() as m:
        m.setattr(tiff, "_insert_front", lambda path, length: False)
        tiff.write_pyramid(tmp_path / "copied.tif", copied_levels)
    assert copied_levels[0].spill.exists()  # the copy leaves its sources
    shuffled_levels, _, _ = raw_pyramid(tmp_path / "shuffled", order=[5, 2, 0, 4, 1, 3])
    tiff.write_pyramid(tmp_path / "shuffled.tif", shuffled_levels)
    assert shuffled_levels[0].spill.exists()  # tiles out of row order are always copied
    data = in_place.read_bytes()
    assert data == (tmp_path / "copied.tif").read_bytes() == (tmp_path / "shuffled.tif").read_bytes()
    first = int(np.frombuffer(tiff.read_tags(data)[tiff.TILE_OFFSETS].raw, "<u4")[0])
    assert first % tiff.ALIGNMENT == 0 and not any(data[first - 16:first])
    assert cog_validate(str(in_place), quiet=True)[0]
    with rasterio.open(in_place) as src:
        assert np.array_equal(src.read(1), image)
    probe = tmp_path / "probe"
    probe.write_bytes(b"x" * 2 * tiff.ALIGNMENT)
    if tiff._insert_front(probe, tiff.ALIGNMENT):  # this file system inserts ranges: the in-place path was taken
        assert probe.read_bytes() == b"\0" * tiff.ALIGNMENT + b"x" * 2 * tiff.ALIGNMENT
        assert not stayed


def test_edge_tiles_are_padded_with_the_fill(tmp_path):
    """The part of an edge tile past the image holds the layer's fill (so identical builds give identical
    bytes): the corner tile decoded with zlib, independently of GDAL, which never shows that part."""
    import zlib

    staged, values = write_cogs(tmp_path, (256, 256))
    data = staged["age"].read_bytes()
    tags = tiff.read_tags(data)
    tile = int(np.frombuffer(tags[tiff.TILE_WIDTH].raw, "<u2")[0])
    offsets = np.frombuffer(tags[tiff.TILE_OFFSETS].raw, "<u4")
    counts = np.frombuffer(tags[tiff.TILE_BYTE_COUNTS].raw, "<u4")
    ny, nx = values["age"].shape
    across = -(-nx // tile)
    corner = len(offsets) - 1  # the bottom-right tile: ragged both ways
    stream = data[offsets[corner]:offsets[corner] + counts[corner]]
    # a zlib stream (RFC 1950) declaring the 1 KiB window it was made with: CINFO = log2(window) - 8 = 2
    assert stream[0] & 0x0F == 8 and stream[0] >> 4 == geotiff.DEFLATE_WINDOW_BITS - 8 == 2
    assert int.from_bytes(stream[:2], "big") % 31 == 0
    decoded = np.frombuffer(zlib.decompress(stream), "<f4").reshape(tile, tile)
    h, w = ny - (corner // across) * tile, nx - (corner % across) * tile
    assert 0 < h < tile and 0 < w < tile
    assert np.isnan(decoded[h:]).all() and np.isnan(decoded[:h, w:]).all()
    np.testing.assert_array_equal(decoded[:h, :w], values["age"][-h:, -w:])
    again, _ = write_cogs(tmp_path, (100, 300), tag="-again")
    assert again["age"].read_bytes() == data


def test_tags_of_many_layers_are_those_gdal_writes_for_each_layer_alone():
    # reference: GDAL's own one-band GeoTIFF of each layer (its georeferencing, nodata and metadata tags);
    # the layers are of several types and fills, with text XML must escape, a line break and no attributes
    spec = GridSpec(REGION, SPACING)
    crs = rasterio.crs.CRS.from_wkt(spec.pyproj_crs.to_wkt())
    layers = {"age": (np.dtype(np.float32), np.nan, {"long_name": "crustal age", "units": "Myr",
                                                     "comment": 'young < old & "dated"\nsecond line'}),
              "age_flag": (np.dtype(np.int8), -128, {"long_name": "how", "units": "1", "flag_values": "1 2 3"}),
              "bare": (np.dtype(np.float32), np.nan, {}),
              "depth": (np.dtype(np.float32), np.nan, {"units": "m"}),
              "count": (np.dtype(np.int16), -1, {"long_name": "count"})}
    got = georeferencing_tags(spec, layers)
    for name, (dtype, fill, attrs) in layers.items():
        with MemoryFile() as memory:
            with memory.open(driver="GTiff", width=1, height=1, count=1, dtype=dtype.name, crs=crs,
                             transform=spec.transform, nodata=fill) as band:
                band.set_band_description(1, str(attrs.get("long_name", name)))
                band.update_tags(1, **{k: str(v) for k, v in attrs.items()})
                if attrs.get("units"):
                    band.set_band_unit(1, str(attrs["units"]))
            alone = tiff.read_tags(memory.read())
        assert got[name] == {code: alone[code] for code in COPIED_TAGS if code in alone}, name
        assert GDAL_METADATA in got[name] and GDAL_NODATA in got[name]
