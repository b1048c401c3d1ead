"""Build-file errors: exit 2, the file and the key named, the nearest valid key suggested."""
import pytest

from agegrid.cli import main
from agegrid.config import load_build_file
from agegrid.errors import BadInput

BASE = """name = "t"
[inputs]
picks = "picks.csv"
ridges = "ridges.geojson"
[grid]
region = [0, 10, -5, 5]
spacing = 0.1
"""


@pytest.fixture
def folder(tmp_path):
    (tmp_path / "picks.csv").write_text("lon,lat,age_ma\n1,0,1\n")
    (tmp_path / "ridges.geojson").write_text('{"type":"LineString","coordinates":[[0,0],[0,1]]}')
    return tmp_path


def write(folder, text):
    path = folder / "build.toml"
    path.write_text(text)
    return path


def test_valid_file_resolves_paths(folder):
    config = load_build_file(write(folder, BASE))
    assert config.inputs.picks == (folder / "picks.csv").resolve()
    assert config.output.directory == (folder / "out").resolve()
    assert config.age.timescale == "CK95" and config.depth.models == ["gdh1"]


@pytest.mark.parametrize("edit,key,words", [
    (("spacing = 0.1", "spaceing = 0.1"), "grid.spaceing", "did you mean 'spacing'"),
    (("spacing = 0.1", 'spacing = "fine"'), "grid.spacing", "number"),
    (("spacing = 0.1", "spacing = 0"), "grid.spacing", "positive"),
    (("spacing = 0.1", "spacing = -1"), "grid.spacing", "positive"),
    (("region = [0, 10, -5, 5]", "region = [10, 0, -5, 5]"), "grid.region", "west"),
    (("region = [0, 10, -5, 5]", "region = [0, 10, 5, -5]"), "grid.region", "south"),
    (("region = [0, 10, -5, 5]", "region = [0, 10]"), "grid.region", ""),
    (("[grid]", "[gird]"), "gird", "did you mean 'grid'"),
    (('name = "t"', 'name = "a b/c"'), "name", "file stem"),
    (('ridges = "ridges.geojson"', 'ridges = "nowhere.geojson"'), "inputs.ridges", "not found"),
    (('picks = "picks.csv"\n', ""), "inputs.picks", "required"),
    (("spacing = 0.1", 'spacing = 0.1\ncrs = "EPSG:99999999"'), "grid.crs", "unknown CRS"),
    (("region = [0, 10, -5, 5]", "region = [0, 10, -95, 5]"), "grid", "[-90, 90]"),
    (("region = [0, 10, -5, 5]", "region = [0, 370, -5, 5]"), "grid", "more than 360"),
])
def test_config_errors_name_the_key(folder, edit, key, words):
    path = write(folder, BASE.replace(*edit))
    with pytest.raises(BadInput) as err:
        load_build_file(path)
    assert err.value.path == str(path)
    assert err.value.where.startswith(key)
    assert words in err.value.what


@pytest.mark.parametrize("extra,key,words", [
    ('[depth]\nmodels = ["gdh2"]\n', "depth.models", "did you mean 'gdh1'"),
    ('[age]\ntimescale = "CK59"\n', "age.timescale", "unknown timescale"),
    ('[output]\nformats = ["shapefile"]\n', "output.formats.0", ""),
    ('[depth.parameters]\nplate = { thickness = 100 }\n', "depth", "no parameter"),
    ('[picks]\nsuspect = "ignore"\n', "picks.suspect", ""),
])
def test_section_errors(folder, extra, key, words):
    with pytest.raises(BadInput) as err:
        load_build_file(write(folder, BASE + extra))
    assert err.value.where == key and words in err.value.what


def test_broken_toml(folder):
    with pytest.raises(BadInput, match="broken TOML"):
        load_build_file(write(folder, BASE + "[grid\n"))


def test_cli_exit_2_without_traceback(folder, capsys):
    path = write(folder, BASE.replace("spacing = 0.1", "spaceing = 0.1"))
    assert main(["build", str(path), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert str(path) in err and "grid.spaceing" in err and "Traceback" not in err


def test_grid_too_large_is_refused_before_allocating(folder, capsys):
    path = write(folder, BASE.replace("region = [0, 10, -5, 5]", "region = [-180, 180, -90, 90]")
                 .replace("spacing = 0.1", "spacing = 0.001"))
    assert main(["build", str(path), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "GiB" in err and "coarser spacing" in err
