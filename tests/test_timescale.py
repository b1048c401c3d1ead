"""Bundled polarity timescales against the published boundary ages, internal checks, chron labels."""
import numpy as np
import pytest

from agegrid import timescale
from agegrid.errors import BadInput

# (chron, young end Ma, old end Ma) as published; read from the public copies listed in
# ../shared/timescales/README.md (no value from memory).
PUBLISHED = {
    # Cande & Kent (1995) J. Geophys. Res. 100(B4) for C1n-C33r; Channell et al. (1995) SEPM Spec. Publ. 54
    # (CENT94) for the C34n old end and the M-sequence, the usual composite.
    "CK95": [("C1n", 0.000, 0.780), ("C2An.1n", 2.581, 3.040), ("C3An.1n", 5.894, 6.137), ("C5n.2n", 9.920, 10.949),
             ("C5ADn", 14.178, 14.612), ("C6Cn.1n", 23.353, 23.535), ("C13n", 33.058, 33.545),
             ("C18n.1n", 38.426, 39.552), ("C21n", 46.264, 47.906), ("C24n.1n", 52.364, 52.663),
             ("C29n", 63.976, 64.745), ("C33n", 73.619, 79.075), ("C34n", 83.000, 120.600),
             ("M0r", 120.600, 121.000), ("M5n", 125.670, 126.570), ("M10n", 128.930, 129.250),
             ("M16n", 136.490, 137.850), ("M21n", 145.520, 146.560), ("M25n", 153.430, 154.000),
             ("M29r", 157.270, 157.530)],
    # Ogg (2004), in A Geologic Time Scale 2004, Cambridge Univ. Press
    "GTS2004": [("C1n", 0.000, 0.781), ("C2An.1n", 2.581, 3.032), ("C3An.1n", 6.033, 6.252), ("C5n.2n", 9.987, 11.040),
                ("C5ADn", 14.194, 14.581), ("C6Cn.1n", 22.564, 22.754), ("C13n", 33.266, 33.738),
                ("C18n.1n", 38.032, 38.975), ("C21n", 45.346, 47.235), ("C24n.1n", 52.648, 53.004),
                ("C29n", 64.432, 65.118), ("C33n", 73.577, 79.543), ("C34n", 84.000, 124.610),
                ("M0r", 124.610, 125.000), ("M5n", 129.760, 130.800), ("M10n", 133.500, 133.870),
                ("M16n", 141.050, 142.060), ("M21n", 147.770, 148.540), ("M25n", 154.080, 154.370),
                ("M29r", 157.510, 157.730), ("M33n", 158.940, 159.220)],
    # Ogg (2012), ch. 5 of The Geologic Time Scale 2012, Elsevier
    "GTS2012": [("C1n", 0.000, 0.781), ("C2An.1n", 2.581, 3.032), ("C3An.1n", 6.033, 6.252), ("C5n.2n", 9.984, 11.056),
                ("C5ADn", 14.163, 14.609), ("C6Cn.1n", 22.564, 22.754), ("C13n", 33.157, 33.705),
                ("C18n.1n", 38.615, 39.627), ("C21n", 45.724, 47.349), ("C24n.1n", 52.620, 53.074),
                ("C29n", 64.958, 65.688), ("C33n", 74.309, 79.900), ("C34n", 83.640, 125.930),
                ("M0r", 125.930, 126.300), ("M5n", 130.600, 131.430), ("M10n", 133.580, 133.880),
                ("M16n", 140.420, 141.640), ("M21n", 148.440, 149.350), ("M25n", 155.540, 155.850),
                ("M29r", 159.140, 159.380)],
    # Ogg (2020), ch. 5 of Geologic Time Scale 2020, Elsevier: C-sequence only
    "GTS2020": [("C1n", 0.000, 0.773), ("C2An.1n", 2.595, 3.032), ("C3An.1n", 6.023, 6.272), ("C5n.2n", 9.984, 11.056),
                ("C5ADn", 14.163, 14.609), ("C6Cn.1n", 22.621, 22.792), ("C13n", 33.214, 33.726),
                ("C18n.1n", 38.398, 39.582), ("C21n", 46.235, 47.760), ("C24n.1n", 52.540, 52.930),
                ("C29n", 64.862, 65.700), ("C33n", 74.201, 79.900)],
}


@pytest.mark.parametrize("name", sorted(PUBLISHED))
def test_published_boundaries(name):
    scale = timescale.load(name)
    rows = PUBLISHED[name]
    assert len(rows) * 2 >= 15 + 2 * (name == "GTS2020")  # young and old ends: >= 15 boundaries each
    for chron, young, old in rows:
        assert scale.boundary(chron, "young") == pytest.approx(young, abs=1e-9), chron
        assert scale.boundary(chron, "old") == pytest.approx(old, abs=1e-9), chron


@pytest.mark.parametrize("name", sorted(timescale.BUNDLED))
def test_internal_checks_and_round_trip(name):
    scale = timescale.load(name)
    assert scale.check() is not None  # contiguous, alternating, ordered: raises otherwise
    assert scale.reference
    for i, chron in enumerate(scale.chrons):
        young, old = scale.young[i], scale.old[i]
        if not np.isfinite(old) or old == young:
            continue
        mid = 0.5 * (young + old)
        assert scale.chron_at(mid) == chron  # age -> chron
        assert scale.boundary(chron, "young") <= mid <= scale.boundary(chron, "old")  # chron -> age
        assert scale.polarity_at(mid) == (1 if chron.endswith("n") else -1)


def test_caveats_kept():
    ck = timescale.load("CK95")
    assert "M11An.1r" in ck.metadata["notes"] and "zero length" in ck.metadata["notes"]
    assert "120.6" in ck.metadata["composite"]
    assert "zero length" in timescale.load("GTS2004").metadata["notes"]
    gts20 = timescale.load("GTS2020")
    assert "suspect" in gts20.metadata["caveat"]
    with pytest.raises(KeyError, match="no old end"):
        gts20.boundary("C34n", "old")
    assert gts20.polarity_at(100.0) == 0  # nothing dated past the table
    # one name, two intervals: C1r.2r ends at C2n in CK95 but at C1r.2n in GTS2012
    assert ck.neighbours("C1r.2r", "old") == ("C1r.2r", "C2n")
    assert timescale.load("GTS2012").neighbours("C1r.2r", "old") == ("C1r.2r", "C1r.2n")


@pytest.mark.parametrize("label,canonical", [
    ("C5n.2n", "C5n.2n"), ("c5N.2N", "C5n.2n"), (" C 3An . 1n ", "C3An.1n"), ("C13r", "C13r"), ("c34n", "C34n"),
    ("M0r", "M0r"), ("m25N", "M25n"), ("5n.2n", "C5n.2n"), ("M10Nn.1n", "M10Nn.1n")])
def test_chron_label_forms(label, canonical):
    assert timescale.normalise_chron(label) == canonical
    assert timescale.load("CK95").resolve(label) == canonical


def test_parent_chron_spans_subchrons():
    ck = timescale.load("CK95")
    assert ck.boundary("C5n", "young") == ck.boundary("C5n.1n", "young")
    assert ck.boundary("C5n", "old") == ck.boundary("C5n.2n", "old")


def test_unknown_chron_suggests():
    with pytest.raises(KeyError, match="close matches: .*C5n.2n"):
        timescale.load("CK95").resolve("C5n.3n")
    with pytest.raises(KeyError, match="not a chron label"):
        timescale.load("CK95").resolve("anomaly five")


@pytest.mark.parametrize("body,message", [
    ("chron,young_ma,old_ma,polarity\nC1n,0,1,N\nC1r,1.5,2,R\n", "contiguous"),
    ("chron,young_ma,old_ma,polarity\nC1n,0,1,N\nC1r,1,2,N\n", "polarity"),
    ("chron,young_ma,old_ma,polarity\nC1n,0,1,N\nC1r,1,0.5,R\n", "younger than"),
    ("chron,young_ma,old_ma\nC1n,0,1\n", "missing column"),
    ("chron,young_ma,old_ma,polarity\nC1n,0,x,N\n", "numbers"),
])
def test_user_table_validation(tmp_path, body, message):
    path = tmp_path / "scale.csv"
    path.write_text(body)
    with pytest.raises(BadInput, match=message) as err:
        timescale.load(str(path))
    assert str(path) in str(err.value)


def test_user_table_loads(tmp_path):
    path = tmp_path / "mine.csv"
    path.write_text("# name: MINE\n# reference: invented for a test\nchron,young_ma,old_ma,polarity\n"
                    "C1n,0,1,N\nC1r,1,2.5,R\nC2n,2.5,3,N\n")
    scale = timescale.load(str(path))
    assert scale.name == "MINE" and scale.boundary("C1r", "old") == 2.5
