#!/usr/bin/env python3
"""Write the reference tables under tests/fixtures/ from reference libraries.

Run once by hand after `pip install pvlib==0.16.1 opencv-python-headless`;
the tables are committed, so the Rust tests need no Python.

    python3 tools/gen_fixtures.py

Every table names its generator in a header comment line starting with '#'.
"""
import os
import numpy as np
import pandas as pd
import pvlib
import cv2

OUT = os.path.join(os.path.dirname(__file__), "..", "tests", "fixtures")
os.makedirs(OUT, exist_ok=True)
rng = np.random.default_rng(20261202)


def write(name, df, source):
    path = os.path.join(OUT, name)
    with open(path, "w") as f:
        f.write(f"# {source}\n")
        df.to_csv(f, index=False, float_format="%.10g")
    print("wrote", path, len(df), "rows")


def spa_table(n=240):
    rows = []
    for _ in range(n):
        # years 1990-2040, uniform seconds
        t0 = pd.Timestamp("1990-01-01T00:00:00Z").value // 10**9
        t1 = pd.Timestamp("2040-12-31T23:59:59Z").value // 10**9
        ts = pd.Timestamp(int(rng.integers(t0, t1)), unit="s", tz="UTC")
        # both hemispheres, with extra weight on high latitudes
        if rng.random() < 0.25:
            lat = float(rng.choice([-1, 1]) * rng.uniform(60, 89.5))
        else:
            lat = float(rng.uniform(-60, 60))
        lon = float(rng.uniform(-180, 180))
        elev = float(rng.uniform(0, 4000))
        pres_hpa = float(rng.uniform(600, 1050))
        temp_c = float(rng.uniform(-30, 40))
        dt = 67.0
        idx = pd.DatetimeIndex([ts])
        sp = pvlib.solarposition.spa_python(idx, lat, lon, altitude=elev,
                                            pressure=pres_hpa * 100, temperature=temp_c,
                                            delta_t=dt, atmos_refract=0.5667, how="numpy")
        r = pvlib.solarposition.nrel_earthsun_distance(idx, how="numpy", delta_t=dt)
        rows.append(dict(time_utc=ts.strftime("%Y-%m-%dT%H:%M:%SZ"), latitude_deg=lat,
                         longitude_deg=lon, elevation_m=elev, pressure_hpa=pres_hpa,
                         temperature_c=temp_c, delta_t_s=dt,
                         zenith_deg=float(sp["zenith"].iloc[0]),
                         apparent_zenith_deg=float(sp["apparent_zenith"].iloc[0]),
                         azimuth_deg=float(sp["azimuth"].iloc[0]),
                         earth_sun_distance_au=float(r.iloc[0])))
    write("spa_pvlib.csv", pd.DataFrame(rows),
          f"pvlib {pvlib.__version__} solarposition.spa_python(how='numpy', atmos_refract=0.5667) and nrel_earthsun_distance")


def clearsky_table():
    rows = []
    for z in [0, 10, 20, 30, 40, 50, 60, 70, 75, 80, 85, 88, 89.5]:
        am_rel = float(pvlib.atmosphere.get_relative_airmass(z, model="kastenyoung1989"))
        hz = pvlib.clearsky.haurwitz(pd.Series([float(z)]))
        for alt in [0.0, 500.0, 1500.0, 3000.0]:
            pres = pvlib.atmosphere.alt2pres(alt)
            am_abs = float(pvlib.atmosphere.get_absolute_airmass(am_rel, pres))
            for tl in [2.0, 3.0, 4.5, 6.0]:
                for dni_extra in [1321.0, 1366.1, 1412.0]:
                    cs = pvlib.clearsky.ineichen(pd.Series([float(z)]), pd.Series([am_abs]), tl,
                                                 altitude=alt, dni_extra=dni_extra)
                    rows.append(dict(apparent_zenith_deg=z, altitude_m=alt, linke_turbidity=tl,
                                     dni_extra_wm2=dni_extra, airmass_relative=am_rel,
                                     airmass_absolute=am_abs, pressure_pa=float(pres),
                                     ghi_wm2=float(cs["ghi"].iloc[0]), dni_wm2=float(cs["dni"].iloc[0]),
                                     dhi_wm2=float(cs["dhi"].iloc[0]),
                                     haurwitz_ghi_wm2=float(hz["ghi"].iloc[0])))
    write("clearsky_pvlib.csv", pd.DataFrame(rows),
          f"pvlib {pvlib.__version__} clearsky.ineichen (perez_enhancement=False), clearsky.haurwitz, atmosphere.get_relative_airmass(kastenyoung1989), alt2pres")
    rows = []
    for doy in range(1, 366, 7):
        ts = pd.Timestamp("2026-01-01", tz="UTC") + pd.Timedelta(days=doy - 1)
        e = float(pvlib.irradiance.get_extra_radiation(pd.DatetimeIndex([ts]), method="spencer").iloc[0])
        rows.append(dict(day_of_year=doy, dni_extra_wm2=e))
    write("extra_radiation_pvlib.csv", pd.DataFrame(rows),
          f"pvlib {pvlib.__version__} irradiance.get_extra_radiation(method='spencer', solar_constant=1366.1)")


def fisheye_table():
    rows = []
    params = [
        # fx, cx, cy, k1, k2, k3, k4
        (300.0, 512.0, 512.0, 0.0, 0.0, 0.0, 0.0),
        (325.0, 500.5, 520.25, -0.02, 0.003, 0.0, 0.0),
        (640.0, 1030.0, 1015.0, 0.05, -0.01, 0.002, -0.0004),
        (160.0, 250.0, 262.0, -0.08, 0.02, -0.004, 0.0005),
    ]
    for pid, (f, cx, cy, k1, k2, k3, k4) in enumerate(params):
        K = np.array([[f, 0, cx], [0, f, cy], [0, 0, 1]], dtype=np.float64)
        D = np.array([k1, k2, k3, k4], dtype=np.float64)
        n = 60
        theta = np.radians(rng.uniform(0, 88, n))
        phi = rng.uniform(-np.pi, np.pi, n)
        pts = np.stack([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi), np.cos(theta)], axis=1)
        pts = pts * rng.uniform(0.5, 5.0, (n, 1))
        img, _ = cv2.fisheye.projectPoints(pts.reshape(-1, 1, 3), np.zeros(3), np.zeros(3), K, D)
        img = img.reshape(-1, 2)
        for i in range(n):
            rows.append(dict(set=pid, f_px=f, cx_px=cx, cy_px=cy, k1=k1, k2=k2, k3=k3, k4=k4,
                             x=pts[i, 0], y=pts[i, 1], z=pts[i, 2], u_px=img[i, 0], v_px=img[i, 1]))
    write("fisheye_opencv.csv", pd.DataFrame(rows),
          f"OpenCV {cv2.__version__} cv2.fisheye.projectPoints (rvec=tvec=0, fx=fy, skew 0)")


if __name__ == "__main__":
    spa_table()
    clearsky_table()
    fisheye_table()


def cli_sun_table():
    """The SPA report's site over a whole day of 2026, as `nephocast sun` prints it."""
    loc = pvlib.location.Location(39.742476, -105.1786, altitude=1830.14)
    times = pd.date_range("2026-06-14T00:00:00Z", "2026-06-15T00:00:00Z", freq="30min")
    sp = loc.get_solarposition(times, pressure=82000.0, temperature=11.0)
    cs = loc.get_clearsky(times, model="ineichen", linke_turbidity=3.0, solar_position=sp)
    df = pd.DataFrame(dict(time_utc=times.strftime("%Y-%m-%dT%H:%M:%SZ"),
                           zenith_deg=sp["apparent_zenith"].values, azimuth_deg=sp["azimuth"].values,
                           ghi_clear_wm2=cs["ghi"].values, dni_clear_wm2=cs["dni"].values,
                           dhi_clear_wm2=cs["dhi"].values))
    write("cli_sun_pvlib.csv", df,
          f"pvlib {pvlib.__version__} Location(39.742476,-105.1786,1830.14).get_solarposition(pressure=82000, temperature=11) "
          "and get_clearsky(model='ineichen', linke_turbidity=3)")


if __name__ == "__main__":
    cli_sun_table()


def transposition_table(n=200):
    """Plane-of-array irradiance by Hay & Davies for fixed and single-axis tracked planes."""
    rows = []
    for i in range(n):
        zen = float(rng.uniform(2, 88))
        az = float(rng.uniform(0, 360))
        dni = float(rng.uniform(0, 950))
        dhi = float(rng.uniform(20, 400))
        ghi = dni * np.cos(np.radians(zen)) + dhi
        dni_extra = float(rng.uniform(1320, 1412))
        if i % 2 == 0:
            kind = "fixed"
            tilt = float(rng.uniform(0, 60)); surf_az = float(rng.uniform(90, 270))
            axis_az = 0.0; max_angle = 0.0
        else:
            kind = "single-axis"
            axis_az = float(rng.choice([0.0, 180.0, 10.0, 350.0, 90.0])); max_angle = float(rng.choice([45.0, 60.0]))
            tr = pvlib.tracking.singleaxis(pd.Series([zen]), pd.Series([az]), axis_tilt=0, axis_azimuth=axis_az,
                                           max_angle=max_angle, backtrack=False)
            tilt = float(tr["surface_tilt"].iloc[0]); surf_az = float(tr["surface_azimuth"].iloc[0])
            if np.isnan(tilt):
                continue
        aoi = float(pvlib.irradiance.aoi(tilt, surf_az, zen, az))
        poa = pvlib.irradiance.get_total_irradiance(tilt, surf_az, zen, az, dni, ghi, dhi, dni_extra=dni_extra,
                                                    model="haydavies", albedo=0.2)
        rows.append(dict(kind=kind, solar_zenith_deg=zen, solar_azimuth_deg=az, dni_wm2=dni, dhi_wm2=dhi, ghi_wm2=ghi,
                         dni_extra_wm2=dni_extra, axis_azimuth_deg=axis_az, max_angle_deg=max_angle,
                         surface_tilt_deg=tilt, surface_azimuth_deg=surf_az, aoi_deg=aoi,
                         poa_global_wm2=float(poa["poa_global"]), poa_direct_wm2=float(poa["poa_direct"]),
                         poa_diffuse_wm2=float(poa["poa_diffuse"])))
    write("transposition_pvlib.csv", pd.DataFrame(rows),
          f"pvlib {pvlib.__version__} tracking.singleaxis(axis_tilt=0, backtrack=False), irradiance.aoi, "
          "irradiance.get_total_irradiance(model='haydavies', albedo=0.2)")


if __name__ == "__main__":
    transposition_table()


def power_table(n=120):
    """Cell temperature (Faiman), DC power (PVWatts linear model) and AC power (PVWatts inverter)."""
    rows = []
    for _ in range(n):
        poa = float(rng.uniform(0, 1300)); temp = float(rng.uniform(-10, 45)); ws = float(rng.uniform(0, 12))
        u0 = float(rng.choice([25.0, 20.0])); u1 = float(rng.choice([6.84, 4.0]))
        gamma = float(rng.choice([-0.004, -0.0035, -0.0047])); pdc0 = float(rng.uniform(500, 8000))
        ac_ratio = float(rng.uniform(1.0, 1.4)); eta = float(rng.choice([0.96, 0.98]))
        tc = float(pvlib.temperature.faiman(poa, temp, ws, u0=u0, u1=u1))
        pdc = float(pvlib.pvsystem.pvwatts_dc(poa, tc, pdc0, gamma))
        pac0 = pdc0 / ac_ratio
        pac = float(pvlib.inverter.pvwatts(pdc, pac0 / eta, eta_inv_nom=eta))
        rows.append(dict(poa_wm2=poa, temp_air_c=temp, wind_speed_mps=ws, u0=u0, u1=u1, cell_temp_c=tc,
                         gamma_pdc=gamma, pdc0_kw=pdc0, pdc_kw=pdc, pac0_kw=pac0, eta_inv_nom=eta, pac_kw=pac))
    write("power_pvlib.csv", pd.DataFrame(rows),
          f"pvlib {pvlib.__version__} temperature.faiman, pvsystem.pvwatts_dc, inverter.pvwatts(pdc0 = pac0 / eta_inv_nom)")


if __name__ == "__main__":
    power_table()
