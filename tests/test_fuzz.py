"""Property-based tests: arbitrary text and numbers give a result or the bad-input error, nothing else."""
import string

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agegrid import timescale
from agegrid.config import load_build_file
from agegrid.errors import BadInput
from agegrid.io.points import read_picks

FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

cell = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr), st.integers().map(str),
                 st.text(alphabet=string.printable, max_size=12), st.sampled_from(["", "C5n.2n", "old", "M0r", "nan"]))
row = st.lists(cell, min_size=0, max_size=8)


@FUZZ
@given(header=st.lists(st.sampled_from(["lon", "lat", "age_ma", "chron", "edge", "id", "track", "sigma_km", "x", ""]),
                       max_size=7), rows=st.lists(row, max_size=6), prefix=st.binary(max_size=8))
def test_picks_reader_never_crashes(tmp_path, header, rows, prefix):
    path = tmp_path / "picks.csv"
    text = ",".join(header) + "\n" + "\n".join(",".join(r) for r in rows)
    path.write_bytes(prefix + text.encode("utf-8", "surrogatepass"))
    try:
        table = read_picks(path)
    except BadInput as exc:
        assert str(path) in str(exc)
        return
    assert len(table) == len(table.lat) and ((table.lat >= -90) & (table.lat <= 90)).all()


@FUZZ
@given(st.text(max_size=20))
def test_chron_parser_never_crashes(label):
    canonical = timescale.normalise_chron(label)
    assert canonical is None or canonical[0] in "CM"
    try:
        name = timescale.load("CK95").resolve(label)
    except KeyError as exc:
        assert isinstance(exc.args[0], str)
    else:
        assert name == canonical


SECTIONS = ["[inputs]", "[grid]", "[age]", "[depth]", "[output]", "[picks]", "[gird]", ""]
KEYS = ["picks", "ridges", "region", "spacing", "crs", "chunk", "timescale", "models", "formats", "name", "directory"]
VALUES = st.one_of(st.integers(-5, 5).map(str), st.floats(allow_nan=False, allow_infinity=False).map(repr),
                   st.sampled_from(['"picks.csv"', '"ridges.geojson"', '[0, 10, -5, 5]', '[10, 0]', '"EPSG:4326"',
                                    '"CK95"', '["gdh1"]', '["netcdf"]', '"t"', 'true', '"x y"', '[', '"EPSG:nope"']))


@FUZZ
@given(st.lists(st.tuples(st.sampled_from(SECTIONS), st.sampled_from(KEYS), VALUES), max_size=10))
def test_config_loader_never_crashes(tmp_path, entries):
    (tmp_path / "picks.csv").write_text("lon,lat,age_ma\n1,0,1\n")
    (tmp_path / "ridges.geojson").write_text('{"type":"LineString","coordinates":[[0,0],[0,1]]}')
    lines = []
    for section, key, value in entries:
        if section:
            lines.append(section)
        lines.append(f"{key} = {value}")
    path = tmp_path / "build.toml"
    path.write_text("\n".join(lines) + "\n")
    try:
        config = load_build_file(path)
    except BadInput as exc:
        assert str(path) in str(exc)
    else:
        from agegrid.grid import GridSpec

        try:
            GridSpec.from_config(config.grid)
        except BadInput:
            pass
