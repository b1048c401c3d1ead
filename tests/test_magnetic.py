"""Magnetic forward model against closed forms, and the magnetic check of picks along profiles."""
import numpy as np
import pytest

from agegrid.magnetic import direction, dipole_inclination, parker_anomaly

C_M = 1e-7  # mu0 / 4 pi, SI


def prism_closed_form(x, x1, x2, z1, z2, m, f, magnetisation):
    """Total-field anomaly (nT) at z = 0 of an infinitely long 2-D prism striking north, by surface charges.

    The closed form for uniformly magnetised 2-D polygons (Talwani & Heirtzler 1964; Blakely 1995,
    Potential Theory in Gravity and Magnetic Applications, section 9): the body is replaced by charges
    M.n on its edges, each edge giving 2 C_m sigma [ln(r1/r2) t + (angle subtended) nu].
    Coordinates: e east (across strike), z down; m and f are (north, east, down) unit vectors.
    """
    corners = [(x1, z1), (x2, z1), (x2, z2), (x1, z2)]  # clockwise in (e, z-down): outward normals below
    me, mz = m[1] * magnetisation, m[2] * magnetisation
    bx = np.zeros_like(x)
    bz = np.zeros_like(x)
    for (ea, za), (eb, zb) in zip(corners, corners[1:] + corners[:1]):
        length = np.hypot(eb - ea, zb - za)
        t = np.array([(eb - ea) / length, (zb - za) / length])
        normal = np.array([t[1], -t[0]])  # outward for this corner order
        centre = np.array([(ea + eb) / 2 - (x1 + x2) / 2, (za + zb) / 2 - (z1 + z2) / 2])
        if normal @ centre < 0:
            normal = -normal
        sigma = me * normal[0] + mz * normal[1]
        px, pz = x - ea, 0.0 - za
        a = px * t[0] + pz * t[1]
        d = px * normal[0] + pz * normal[1]
        r1 = np.hypot(px, pz)
        r2 = np.hypot(x - eb, 0.0 - zb)
        log_term = np.log(r1 / r2)
        with np.errstate(divide="ignore", invalid="ignore"):
            angle = np.where(d == 0, 0.0, np.arctan(a / d) - np.arctan((a - length) / d))
        bx += 2 * C_M * sigma * (log_term * t[0] + angle * normal[0])
        bz += 2 * C_M * sigma * (log_term * t[1] + angle * normal[1])
    return (bx * f[1] + bz * f[2]) * 1e9


def parker_prism(x, x1, x2, z1, z2, m, f, magnetisation, ny=4):
    dx = x[1] - x[0]
    cells = ((x >= x1) & (x < x2)).astype(float) * magnetisation
    grid = np.repeat(cells[None, :], ny, axis=0)
    anomaly, terms = parker_anomaly(grid, np.full(grid.shape, z1), z2 - z1, dx, dx, m, f)
    return anomaly[0], terms


X = np.arange(-200e3, 200e3, 100.0) + 50.0
CASES = [  # (magnetisation I, D), (field I, D)
    ((90.0, 0.0), (90.0, 0.0)),
    ((60.0, 30.0), (60.0, 30.0)),
    ((-40.0, 100.0), (55.0, 20.0)),
    ((20.0, 70.0), (-35.0, -15.0)),
]


@pytest.mark.parametrize("mag,fld", CASES)
def test_parker_matches_closed_form_prism(mag, fld):
    m, f = direction(*mag), direction(*fld)
    x1, x2, z1, z2 = -5e3, 5e3, 3000.0, 3500.0
    exact = prism_closed_form(X, x1, x2, z1, z2, m, f, 5.0)
    parker, _ = parker_prism(X, x1, x2, z1, z2, m, f, 5.0)
    centre = np.abs(X) < 60e3
    peak = np.abs(exact[centre]).max()
    assert np.abs(parker[centre] - exact[centre]).max() <= 0.01 * peak


def test_skewness_of_schouten_and_mccamy():
    """Oblique anomaly = vertical anomaly phase-shifted by theta = 180 - (I'm + I'f), scaled by
    sin Im sin If / (sin I'm sin I'f), with effective inclinations tan I' = tan I / sin(D) for a profile
    running east (Schouten & McCamy 1972, J. Geophys. Res. 77, 7089-7099)."""
    mag, fld = (45.0, 60.0), (30.0, 40.0)
    m, f = direction(*mag), direction(*fld)
    x1, x2, z1, z2 = -5e3, 5e3, 3000.0, 3500.0
    oblique, _ = parker_prism(X, x1, x2, z1, z2, m, f, 5.0)
    vertical = prism_closed_form(X, x1, x2, z1, z2, direction(90, 0), direction(90, 0), 5.0)

    def effective(inc, dec):
        return np.degrees(np.arctan2(np.tan(np.radians(inc)), np.sin(np.radians(dec))))

    im, jf = effective(*mag), effective(*fld)
    theta = np.radians(180.0 - (im + jf))
    amplitude = (np.sin(np.radians(mag[0])) * np.sin(np.radians(fld[0]))
                 / (np.sin(np.radians(im)) * np.sin(np.radians(jf))))
    spectrum = np.fft.fft(vertical)
    k = np.fft.fftfreq(len(X))
    shifted = np.real(np.fft.ifft(spectrum * np.exp(1j * theta * np.sign(k)))) * amplitude
    centre = np.abs(X) < 60e3
    assert np.abs(oblique[centre] - shifted[centre]).max() <= 0.01 * np.abs(shifted[centre]).max()


def test_series_handles_an_uneven_top():
    """A layer with an uneven top equals the sum of the prisms that make it up (superposition)."""
    m, f = direction(60, 10), direction(50, -20)
    x = np.arange(-400e3, 400e3, 200.0) + 100.0  # wide: a 2-D source falls off as 1/r, so periodic images matter
    ny = 4
    top = np.where(np.abs(x) < 8e3, 2500.0, 3200.0)  # a seamount-like step of 700 m
    mag = np.where(np.abs(x) < 20e3, 4.0, 0.0)
    grid_m = np.repeat(mag[None, :], ny, 0)
    grid_z = np.repeat(top[None, :], ny, 0)
    parker, terms = parker_anomaly(grid_m, grid_z, 500.0, 200.0, 200.0, m, f)
    exact = (prism_closed_form(x, -20e3, -8e3, 3200.0, 3700.0, m, f, 4.0)
             + prism_closed_form(x, -8e3, 8e3, 2500.0, 3000.0, m, f, 4.0)
             + prism_closed_form(x, 8e3, 20e3, 3200.0, 3700.0, m, f, 4.0))
    centre = np.abs(x) < 40e3
    assert terms > 2
    assert np.abs(parker[0][centre] - exact[centre]).max() <= 0.01 * np.abs(exact[centre]).max()


def test_dipole_inclination():
    # tan I = 2 tan(latitude) for a geocentric axial dipole (Butler 1992, Paleomagnetism; equation number from memory)
    assert dipole_inclination(0.0) == 0.0
    assert dipole_inclination(45.0) == pytest.approx(np.degrees(np.arctan(2.0)))
    assert dipole_inclination(-30.0) == pytest.approx(-np.degrees(np.arctan(2 * np.tan(np.radians(30)))))


def test_profile_check_flags_a_moved_pick(tmp_path):
    """A pick moved 15 km along its track is flagged with the shift recovered to 3 km; clean picks are not."""
    import csv
    import json

    import dask
    import pyproj

    from agegrid import sphere, thermal, timescale
    from agegrid.cli import main
    from agegrid.grid import GridSpec
    from agegrid.magnetic import MagneticSettings, anomaly_layer
    from agegrid.synthetic import Stage, SyntheticBasin
    from agegrid.alignment import sample
    from tests.helpers import basin_build

    basin = SyntheticBasin(pole=(-60.0, 50.0), spin_deg=90.0, bands=[-3.0, 0.5, 4.0], ridge_lon=[0.0, 0.8],
                           stages=[Stage(4.0, 60.0, 50.0), Stage(9.0, 45.0, 55.0)])
    ck = timescale.load("CK95")
    profile = []
    records = basin.survey(ck, 24, noise_km=0.5, seed=8, profile=profile, profile_step=1)
    spec = GridSpec(basin.region(0.5), 0.02)
    settings = MagneticSettings(500.0, 5.0, None, 55.0, 12.0)
    lon, lat = spec.lonlat()
    truth = basin.age(lon, lat)
    import dask.array as da

    true_age = da.from_array(truth, chunks=spec.chunks)
    top = da.from_array(thermal.MODELS["gdh1"].depth(truth), chunks=spec.chunks)
    with dask.config.set(scheduler="threads"):
        observed = anomaly_layer(spec, true_age, top, ck, settings).compute()
    plon, plat = np.array([p["lon"] for p in profile]), np.array([p["lat"] for p in profile])
    anomaly = sample(observed, spec, plon, plat)
    with open(tmp_path / "tracks.csv", "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["lon", "lat", "anomaly_nt", "track"])
        for p, a in zip(profile, anomaly):
            if np.isfinite(a):
                writer.writerow([p["lon"], p["lat"], round(float(a), 3), p["track"]])
    # move one pick 15 km along its own track, away from the track's ends
    track_points = {}
    for p in profile:
        track_points.setdefault(p["track"], []).append((p["lon"], p["lat"]))
    candidates = [r for r in records if 3.0 < r["age_ma"] < 8.0]
    victim = candidates[len(candidates) // 2]
    pts = np.array(track_points[victim["track"]])
    k = int(np.argmin(sphere.distance_km(victim["lon"], victim["lat"], pts[:, 0], pts[:, 1])))
    geod = pyproj.Geod(a=sphere.EARTH_RADIUS_KM * 1e3, b=sphere.EARTH_RADIUS_KM * 1e3)
    az, _, _ = geod.inv(pts[k - 3, 0], pts[k - 3, 1], pts[k + 3, 0], pts[k + 3, 1])
    lon2, lat2, _ = geod.fwd(victim["lon"], victim["lat"], az, 15e3)
    moved = dict(victim, lon=float(lon2), lat=float(lat2), id="MOVED")
    picks = [moved if r is victim else r for r in records]
    build = basin_build(tmp_path, basin, records=picks, spacing=0.02, chunk=256,
                        extra="")
    text = build.read_text().replace('[grid]', 'magnetic_profiles = "tracks.csv"\n[grid]')
    text += '[magnetic]\nfield_inclination = 55.0\nfield_declination = 12.0\n'
    build.write_text(text)
    assert main(["build", str(build), "--quiet"]) == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    flagged = {p["id"]: p for p in manifest["magnetic"]["flagged_picks"]}
    assert "MOVED" in flagged, manifest["magnetic"]["flagged_picks"][:5]
    assert abs(abs(flagged["MOVED"]["error_km"]) - 15.0) <= 3.0, flagged["MOVED"]
    assert set(flagged) == {"MOVED"}, sorted(flagged)
    assert manifest["magnetic"]["picks_checked"] > 100
    rows = list(csv.DictReader(open(tmp_path / "out" / "basin_tracks.csv")))
    assert {"track", "lag_km", "median_age_offset_myr", "correlation", "flagged"} <= set(rows[0])
    assert sum(int(r["flagged"]) for r in rows) == 1
    assert any(f["id"] == "MOVED" and f["kind"] == "magnetic_mismatch" for f in manifest["qa"]["suspect_picks"])
    # agegrid validate runs the same check without writing anything
    import io
    from contextlib import redirect_stdout

    buffer = io.StringIO()
    with redirect_stdout(buffer):
        assert main(["validate", str(build), "--quiet"]) == 0
    report = json.loads(buffer.getvalue())
    assert [f["id"] for f in report["qa"]["suspect_picks"] if f["kind"] == "magnetic_mismatch"] == ["MOVED"]
