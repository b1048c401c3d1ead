"""Property-based tests: arbitrary text and numbers give a result or the bad-input error, nothing else."""
import string

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agegrid import timescale
from agegrid.config import load_build_file
from agegrid.errors import BadInput
import numpy as np

from agegrid.io.points import _parse_columns, _parse_record, read_picks

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


number = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr), st.integers(-400, 400).map(str),
                   st.sampled_from(["", " ", "1_0", " 7 ", "1e2", "-0", "nan", "inf", "-inf", "x"]))
# mostly valid values, so that whole tables pass and each field's odd values are met among valid neighbours
field = st.one_of(st.floats(-80, 80).map(repr), st.sampled_from(["12.5", " 3 ", "0"]), number)
record = st.fixed_dictionaries({"lon": field, "lat": field, "age_ma": field, "sigma_km": field,
                                "chron": st.sampled_from(["", "C5n.2n", " C1n "]),
                                "edge": st.sampled_from(["", "young", " OLD ", "old", "middle"])})


@settings(max_examples=400, deadline=None)
@given(records=st.lists(record, min_size=1, max_size=4))
def test_column_parse_accepts_exactly_what_the_record_parse_accepts(records):
    """The fast column-by-column parse of a pick table gives the record-by-record result (the reference:
    each value through ``_parse_record``'s checks) or gives up; it never lets a value through that the
    record parse rejects."""
    try:
        expected = list(zip(*[_parse_record(r, "picks.csv", f"line {i}") for i, r in enumerate(records, 2)]))
    except BadInput:
        assert _parse_columns(records) is None
        return
    parsed = _parse_columns(records)
    if parsed is not None:  # it may give up on text float() reads but the fast path does not expect
        for got, want in zip(parsed, expected):
            if isinstance(got, np.ndarray):
                np.testing.assert_array_equal(got, np.array(want))
            else:
                assert list(got) == list(want)


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
