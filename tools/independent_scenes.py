#!/usr/bin/env python3
"""Run nephocast on the independent-renderer scenes the way a user would, and score it.

This is a CHECK, not a tuning target. The scenes (see their README.md) come from a renderer that
nephocast was not built around; other cameras and seeds of that renderer are held back and are
what the work is judged on. Use the numbers this prints to find out whether the engine holds up,
never to fit settings to these particular scenes.

For each camera (every `CAMERA` with a `CAMERA-…clear-day` folder: camera1 and camera2 here) and each
of its cloudy scenes (a camera with several is run once per scene, in `WORK/CAMERA/SCENE`), the script:

1. writes site files into the work folder from ``input/site.json`` and ``input/ceilometer.json``:
   one fixed horizontal block (so POA = GHI) over the plant footprint, a 15-minute forecast at
   60 s steps, and three pyranometers taken from ``input/points.csv`` (nearest to the centres of
   the footprint's western third, middle and eastern third);
2. writes a measurements CSV for the cloudy scene from ``truth/truth_points.csv`` at those three
   points (1-minute means by default, ``--measurement-minutes``; ``time_utc`` = start of the period,
   or its end with ``--causal-measurements``): synthetic pyranometer readings, the
   only thing taken from ``truth/`` that the engine sees;
3. obtains the camera: ``nephocast calibrate`` on the clear day (``--camera-from calibrate``, the
   user's way) or, as a diagnostic only, ``truth/camera.json`` converted to nephocast's convention
   (``--camera-from truth``; the conversion is verified with ``nephocast camera project``);
4. measures the calibration against the true camera on a grid of sky directions (pixel and
   angular error per zenith band), with ``nephocast camera project`` / ``unproject``, sets the
   stated bound beside the true error, and (camera from ``calibrate``) sets the sun detections
   ``calibrate`` used against the true sun pixel of ``truth/truth.csv``: their image-radial and
   tangential lean, for bare discs and bloomed ones (``--calibration-only`` stops here);
5. replays the cloudy scene with the measurements and scores forecasts, motion and ramp warnings
   with the scene's ``score.py``;
6. replays the clear day with the same camera and scores its forecasts too;
7. prints a compact markdown summary and writes everything to ``--json``.

The engine only ever sees ``input/`` plus the synthetic pyranometer readings.
"""
import argparse
import json
import math
import os
import re
import shutil
import sys
import tomllib

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from scene_probes import FrameGeometry, StaticPaint, reencoded  # noqa: E402
import scene_camera  # noqa: E402
from scene_camera import (PyCamera, bin_project, calibration_error, calibration_from_truth,  # noqa: E402,F401
                          detection_lean, euler_from_matrix, grid_directions, placeholder_calibration, read_json, run,
                          toml_table, toml_value, verify_truth_conversion)
from scene_report import markdown, summary_table  # noqa: E402,F401

HORIZONS = list(range(1, 16))
CLEAR_SUBSETS = ("all", "morning", "afternoon", "midday", "every3", "low-sun")
LOW_SUN_MIN_ZENITH_DEG = 50.0


# ------------------------------------------------------------------ site and measurements
def pick_pyranometers(points, fp):
    """Points nearest the centres of the footprint's western third, middle and eastern third."""
    ce, cn, se = fp["center_e_m"], fp["center_n_m"], fp["size_e_m"]
    out = []
    for name, e in (("west", ce - se / 3.0), ("centre", ce), ("east", ce + se / 3.0)):
        d = np.hypot(points["east_m"] - e, points["north_m"] - cn)
        r = points.iloc[int(np.argmin(d.to_numpy()))]
        out.append(dict(name=name, point_id=int(r["point_id"]), position_m=[float(r["east_m"]), float(r["north_m"])]))
    return out


def write_site(path, site_json, ceil_json, calibration, pyranometers, settings=()):
    s = site_json["site"]
    fp = site_json["plant_footprint"]
    ce, cn, se, sn = fp["center_e_m"], fp["center_n_m"], fp["size_e_m"], fp["size_n_m"]
    poly = [[ce - se / 2, cn - sn / 2], [ce + se / 2, cn - sn / 2], [ce + se / 2, cn + sn / 2], [ce - se / 2, cn + sn / 2]]
    cbh = (ceil_json or {}).get("cloud_base_heights_m") or []
    base = float(cbh[0]) if cbh else 1500.0
    # Settings given with --set SECTION.KEY=VALUE (TOML values); a key the harness writes itself
    # (e.g. clouds.base_height_m) is replaced, not written twice.
    extra = {}
    for kv in settings:
        k, v = kv.split("=", 1)
        sec, key = k.strip().rsplit(".", 1)
        extra.setdefault(sec, {})[key.strip()] = v.strip()

    def table(name, d):
        lines = {k: toml_value(v) for k, v in d.items()}
        lines.update(extra.pop(name, {}))
        return f"[{name}]\n" + "".join(f"{k} = {v}\n" for k, v in lines.items()) + "\n"

    text = "# Written by tools/independent_scenes.py from input/site.json (a check, not a tuned site).\n"
    text += table("site", {"name": s["name"], "latitude_deg": s["latitude"], "longitude_deg": s["longitude"],
                           "elevation_m": s["altitude_m"]})
    cam = {"calibration": os.path.abspath(calibration), "position_m": [0.0, 0.0, 0.0]}
    # How the frames' names carry their time: the scene's own strftime pattern when it gives one
    # (the engine's default, `…YYYYMMDDTHHMMSSZ…`, reads the shared scenes' names the same way).
    if site_json.get("frame_name_format"):
        cam["frame_time_format"] = site_json["frame_name_format"]
    text += table("camera", cam)
    # The base the site file configures (None: none, the engine estimates it from its prior).
    given = extra.get("clouds", {}).get("base_height_m")
    used_base = float(given) if given is not None else (base if cbh else None)
    # No ceilometer: no base configured (a user who does not know it); the engine estimates it by
    # shadow timing at the pyranometers, from its unconfigured prior of 1500 m.
    text += table("clouds", {"base_height_m": base} if cbh else {})
    text += table("plant", {"point_spacing_m": 25.0})
    # A horizontal fixed block: its POA is GHI. Capacity ~200 W/m2 of footprint.
    text += toml_table("plant.blocks", {"name": "footprint", "polygon_m": poly, "capacity_kw": round(se * sn * 0.2),
                                        "mount": "fixed", "tilt_deg": 0.0, "azimuth_deg": 180.0}, array=True)
    text += table("forecast", {"horizon_min": 15, "step_s": 60})
    for sec, lines in extra.items():
        text += f"[{sec}]\n" + "".join(f"{k} = {v}\n" for k, v in lines.items()) + "\n"
    for p in pyranometers:
        text += toml_table("pyranometers", {"name": p["name"], "position_m": p["position_m"]}, array=True)
    with open(path, "w") as f:
        f.write(text)
    return used_base


def write_measurements(path, truth_points_csv, pyranometers, end_stamped=False, period_min=1, shift_min=0):
    """`period_min`-minute means (time_utc = start of the period) at the pyranometer points, frame
    period only. `end_stamped` stamps each mean at the end of its period instead (the site file then
    says so: `[measurements] time_label = "end"`). `shift_min` adds that many minutes to every stamp
    (a logger whose clock is off, e.g. 60: on local time an hour ahead of UTC)."""
    tp = pd.read_csv(truth_points_csv)
    if "in_tail" in tp:
        tp = tp[tp["in_tail"] == 0]
    t = pd.to_datetime(tp["time"], utc=True)
    tp = tp.assign(minute=t.dt.floor(f"{period_min}min"))
    cols = {}
    for p in pyranometers:
        s = tp[tp["point_id"] == p["point_id"]].groupby("minute")["ghi_wm2"].mean()
        cols[f"ghi_{p['name']}_wm2"] = s
    df = pd.DataFrame(cols).sort_index()
    df.index = (df.index + pd.Timedelta(minutes=(period_min if end_stamped else 0) + shift_min)).strftime("%Y-%m-%dT%H:%M:%SZ")
    df.index.name = "time_utc"
    with open(path, "w") as f:
        f.write(f"# Synthetic pyranometers: {period_min}-minute means of truth_points.csv at frame times; time = "
                + ("end" if end_stamped else "start") + " of the period"
                + (f", every stamp moved by {shift_min:+d} min (a clock that is off)" if shift_min else "") + "\n")
        df.to_csv(f, float_format="%.1f")
    return len(df)


# ------------------------------------------------------------------ replay outputs -> score.py inputs
def convert_replay(out_dir, conv_dir, ramp_min_prob):
    os.makedirs(conv_dir, exist_ok=True)
    res = {}
    fc = pd.read_csv(os.path.join(out_dir, "forecasts.csv"))
    fc = fc[(fc["block"] == "plant") & (fc["horizon_s"] > 0)].copy()
    fc["horizon_min"] = fc["horizon_s"] / 60.0
    fc = fc[fc["horizon_min"].isin(HORIZONS)]
    f_csv = os.path.join(conv_dir, "forecast.csv")
    fc.rename(columns={"issue_time_utc": "issue_time", "ghi_wm2": "ghi_plant_mean_wm2"})[
        ["issue_time", "horizon_min", "ghi_plant_mean_wm2"]].assign(horizon_min=lambda d: d.horizon_min.astype(int)) \
        .to_csv(f_csv, index=False)
    res["forecast"] = f_csv
    res["n_forecast_issues"] = int(fc["issue_time_utc"].nunique())
    mo = pd.read_csv(os.path.join(out_dir, "motion.csv"))
    m_csv = os.path.join(conv_dir, "motion.csv")
    mm = mo[["time_utc", "east_mps", "north_mps"]].dropna()
    mm.rename(columns={"time_utc": "time", "east_mps": "u_ms", "north_mps": "v_ms"}).to_csv(m_csv, index=False)
    res["motion"] = m_csv if len(mm) else None
    res["motion_rows"] = int(len(mm))
    res["motion_frames"] = int(len(mo))
    res["frames_with_second_layer"] = int(mo["second_east_mps"].notna().sum())
    res["frames_measuring_two_layers"] = int((mo["layers"] >= 2).sum())
    rp = pd.read_csv(os.path.join(out_dir, "ramps.csv"))
    rp = rp[rp["probability"] >= ramp_min_prob]
    rows = [dict(issue_time=r.issue_time_utc, ramp_start=r.expected_start_utc, direction=r.direction)
            for r in rp.itertuples()]
    warned = set(rp["issue_time_utc"])
    rows += [dict(issue_time=t, ramp_start="", direction="none") for t in fc["issue_time_utc"].unique() if t not in warned]
    r_csv = os.path.join(conv_dir, "ramps.csv")
    pd.DataFrame(rows, columns=["issue_time", "ramp_start", "direction"]).to_csv(r_csv, index=False)
    res["ramps"] = r_csv
    res["ramp_events_used"] = int(len(rp))
    fr = pd.read_csv(os.path.join(out_dir, "frames.csv"))
    res["frame_status"] = {str(k): int(v) for k, v in fr["status"].value_counts().items()}
    return res


def score(scenes, scene_dir, files, json_out, log):
    cmd = [sys.executable, os.path.join(scenes, "score.py"), scene_dir, "--json", json_out]
    for k in ("forecast", "motion", "ramps"):
        if files.get(k):
            cmd += [f"--{k}", files[k]]
    rc, out, err = run(cmd, log=log)
    if rc != 0:
        return dict(error=f"score.py exited {rc}: {err.strip()[-2000:]}")
    return read_json(json_out)


def forecast_summary(sj, yard):
    """Skill at 5/10/15, pooled 5-15, 1-min RMSE vs smart persistence, largest |MBE|."""
    if "forecast" not in sj:
        return None
    ph = pd.DataFrame(sj["forecast"]["per_horizon"])
    if ph.empty:
        return None
    ph = ph.set_index("horizon_min")
    g = lambda h, k: float(ph.loc[float(h), k]) if float(h) in ph.index else float("nan")  # noqa: E731
    p = ph[(ph.index >= 5) & (ph.index <= 15)]
    pooled_rmse = math.sqrt(float((p["rmse"] ** 2 * p["n"]).sum() / p["n"].sum()))
    pooled_sp = math.sqrt(float((p["rmse_sp"] ** 2 * p["n"]).sum() / p["n"].sum()))
    mbe_h = ph["mbe"].abs().idxmax()
    out = dict(skill_5=g(5, "skill"), skill_10=g(10, "skill"), skill_15=g(15, "skill"),
               skill_pooled_5_15=(1 - pooled_rmse / pooled_sp) if pooled_sp > 0 else float("nan"), rmse_pooled_5_15=pooled_rmse, rmse_sp_pooled_5_15=pooled_sp,
               rmse_1=g(1, "rmse"), rmse_sp_1=g(1, "rmse_sp"),
               rmse_5=g(5, "rmse"), rmse_10=g(10, "rmse"), rmse_15=g(15, "rmse"),
               max_abs_mbe=float(abs(ph.loc[mbe_h, "mbe"])), max_abs_mbe_horizon=float(mbe_h),
               mbe_at_max=float(ph.loc[mbe_h, "mbe"]), overall=sj["forecast"].get("overall"))
    if yard:
        out["yardstick"] = yard
        out["yardstick_pooled_0_8"] = 0.8 * yard["pooled"] if yard.get("pooled") is not None else None
    return out


def motion_summary(motion_csv, scene_dir):
    """Mean vector error and speeds against the true layer-1 wind at the nearest frame."""
    if not motion_csv:
        return None
    m = pd.read_csv(motion_csv)
    tr = pd.read_csv(os.path.join(scene_dir, "truth", "truth.csv"))
    tt = pd.to_datetime(tr["time"], utc=True)
    mt = pd.to_datetime(m["time"], utc=True)
    idx = np.clip(np.searchsorted(tt.to_numpy(), mt.to_numpy()), 0, len(tr) - 1)
    tu, tv = tr["layer1_u_ms"].to_numpy()[idx], tr["layer1_v_ms"].to_numpy()[idx]
    e = np.hypot(m["u_ms"] - tu, m["v_ms"] - tv)
    return dict(n=int(len(m)), mean_vector_error_ms=float(np.mean(e)), median_vector_error_ms=float(np.median(e)),
                mean_speed_ms=float(np.mean(np.hypot(m["u_ms"], m["v_ms"]))), true_speed_ms=float(np.mean(np.hypot(tu, tv))),
                mean_u_ms=float(m["u_ms"].mean()), mean_v_ms=float(m["v_ms"].mean()),
                true_u_ms=float(np.mean(tu)), true_v_ms=float(np.mean(tv)))


def yardsticks(scenes):
    """The 'perfect perception, frozen advection' row per scene from the dataset README (score.py
    does not compute it)."""
    out = {}
    try:
        with open(os.path.join(scenes, "README.md")) as f:
            lines = f.read().splitlines()
    except OSError:
        return out
    scene = None
    for ln in lines:
        cells = [c.strip() for c in ln.strip().strip("|").split("|")]
        if len(cells) < 6:
            continue
        m = re.search(r"`([^`]+)`", cells[0])
        if m:
            scene = m.group(1)
        if scene and "perfect perception" in cells[1]:
            def num(c):
                try:
                    return float(c.replace("−", "-"))
                except ValueError:
                    return None
            out[scene] = dict(h5=num(cells[2]), h10=num(cells[3]), h15=num(cells[4]), pooled=num(cells[5]))
    return out


# ------------------------------------------------------------------ one camera
def camera_folders(scenes, camera):
    """The camera's clear day and its cloudy scenes (one or more): folders named `CAMERA-…`, the
    clear day's name ending in `clear-day`."""
    # Another camera's folders share the prefix when its name extends this one's ("sky-a" and
    # "sky-a-b"): they are left out.
    others = [c for c in discover_cameras(scenes) if c != camera and c.startswith(camera + "-")]
    ds = sorted(d for d in os.listdir(scenes) if d.startswith(camera + "-") and os.path.isdir(os.path.join(scenes, d))
                and not any(d.startswith(o + "-") for o in others))
    clear = [d for d in ds if d == camera + "-clear-day"]
    cloudy = [d for d in ds if not d.endswith("clear-day")]
    if len(clear) != 1 or not cloudy:
        raise RuntimeError(f"{camera}: expected one clear-day folder and at least one cloudy folder, found {ds}")
    return os.path.join(scenes, clear[0]), [os.path.join(scenes, d) for d in cloudy]


def discover_cameras(scenes):
    """Every camera of the scenes folder: the prefix `CAMERA` of each `CAMERA-…clear-day` folder."""
    return sorted({d[: -len("-clear-day")] for d in os.listdir(scenes)
                   if d.endswith("-clear-day") and len(d) > len("-clear-day") and os.path.isdir(os.path.join(scenes, d))})


def run_camera(a, camera, sc, yard, log, res):
    """Fill `res` step by step (so a failure part-way keeps what was done). A camera with several
    cloudy scenes runs once per scene: `res["cloudy_scene"]` names the one, and its work folder is
    `WORK/CAMERA/SCENE` (else `WORK/CAMERA`)."""
    clear, cloudies = camera_folders(a.scenes, camera)
    cloudy = os.path.join(a.scenes, res["cloudy_scene"]) if res.get("cloudy_scene") else cloudies[0]
    res["clear_scene"], res["cloudy_scene"] = os.path.basename(clear), os.path.basename(cloudy)
    work = os.path.join(a.work, camera, res["cloudy_scene"]) if len(cloudies) > 1 else os.path.join(a.work, camera)
    if os.path.isdir(work):
        shutil.rmtree(work)
    os.makedirs(work)
    site_json = read_json(os.path.join(cloudy, "input", "site.json"))
    points = pd.read_csv(os.path.join(cloudy, "input", "points.csv"))
    pyr = pick_pyranometers(points, site_json["plant_footprint"])
    res["pyranometers"] = pyr
    true_cam = read_json(os.path.join(cloudy, "truth", "camera.json"))  # scoring only

    def ceil(d):
        p = os.path.join(d, "input", "ceilometer.json")
        return read_json(p) if os.path.exists(p) and not a.no_ceilometer else None

    # The frames the engine reads: as shipped, or re-encoded at another JPEG quality.
    frames_of = {d: os.path.join(d, "input", "frames") for d in (clear, cloudy)}
    gains = tuple(float(v) for v in a.cloudy_gain.split(",")) if a.cloudy_gain else None
    geom = FrameGeometry(site_json["image_width"], site_json["image_height"], a.mirror, a.flip_vertical, a.rotate, a.scale,
                         a.pad_total, circle=(true_cam["cx"], true_cam["cy"], true_cam["r_max_px"]))
    if not geom.changed:
        geom = None
    else:
        res["frame_geometry"] = dict(size_px=list(geom.size), affine=geom.A[:2].tolist(), rotate_deg=a.rotate,
                                     flip_vertical=a.flip_vertical, mirror=a.mirror, scale=a.scale, pad_total=list(a.pad_total))
    scene_camera.GEOM = GEOM = geom  # the calibration checks move the true camera with the frames
    paint = static_paint(a, clear, true_cam, frames_of)
    if paint is not None:
        res["static_paint"] = dict(poles=[dict(a=s[0].tolist(), b=s[1].tolist(), width_px=s[2]) for s in paint.segments],
                                   reflection_px=None if paint.reflection is None else paint.reflection.tolist(),
                                   reflection_share=a.reflection)
    if a.jpeg_quality or GEOM is not None or a.stamp or gains or paint is not None:
        q = a.jpeg_quality or 95
        for d, tag in ((clear, "clear"), (cloudy, "cloudy")):
            g = gains if d == cloudy else None
            frames_of[d] = reencoded(frames_of[d], q, os.path.join(work, f"{tag}-q{q}" + (GEOM.tag() if GEOM else "")
                                                                  + (f"-stamp-{a.stamp}" if a.stamp else "") + ("-gain" if g else "")
                                                                  + (paint.tag() if paint else "")),
                                    GEOM, a.stamp, g, paint)

    cal = os.path.join(work, "cal.toml")
    site_clear = os.path.join(work, "site-clear.toml")
    site_cloudy = os.path.join(work, "site.toml")
    # 3. camera
    cal_info = dict()
    if a.camera_from == "calibrate":
        ph = os.path.join(work, "placeholder.toml")
        with open(ph, "w") as f:
            f.write("# Placeholder: `calibrate` loads the site file, which must name a calibration.\n")
            f.write(toml_table("camera", placeholder_calibration(*(GEOM.size if GEOM else (site_json["image_width"], site_json["image_height"])))))
        cal_site = os.path.join(work, "site-calibrate.toml")
        write_site(cal_site, read_json(os.path.join(clear, "input", "site.json")), ceil(clear), ph, pyr, a.calibrate_set)
        frames = clear_frames_subset(frames_of[clear], a.clear_subset, os.path.join(work, "clear-frames"),
                                     read_json(os.path.join(clear, "input", "site.json"))["site"], a.low_sun_zenith_deg)
        cal_info["clear_subset"] = a.clear_subset + (f" (sun zenith > {a.low_sun_zenith_deg:g}°)" if a.clear_subset == "low-sun" else "")
        cal_info["clear_frames"] = len([n for n in os.listdir(frames) if n.lower().endswith((".jpg", ".jpeg", ".png"))])
        if a.calibrate_with_cloudy:
            frames, cal_info["cloudy_frames_added"] = with_cloudy_frames(frames, frames_of[cloudy], a.calibrate_with_cloudy,
                                                                         os.path.join(work, "calibrate-frames"))
        rc, out, err = run([a.bin, "calibrate", "--site", cal_site, "--frames", frames, "--out", cal]
                           + (["--obstruction-mask"] if a.obstruction_mask else []), log=log)
        cal_info.update(exit_code=rc, stdout=out, stderr=err,
                        warnings=[ln.strip() for ln in (out + "\n" + err).splitlines() if "warning" in ln.lower()])
    else:
        with open(cal, "w") as f:
            f.write("# Converted from truth/camera.json by tools/independent_scenes.py (diagnostic only).\n")
            f.write(toml_table("camera", calibration_from_truth(true_cam)))
        cal_info.update(exit_code=0, stdout="", stderr="", warnings=[])
    if os.path.exists(cal):
        with open(cal, "rb") as f:
            c = tomllib.load(f)
        cal_info["fields"] = {k: c["camera"].get(k) for k in ("model", "width_px", "height_px", "f_px_per_rad", "cx_px", "cy_px", "max_field_angle_deg",
                                                                "yaw_deg", "pitch_deg", "roll_deg", "k", "mirrored")}
        cal_info["fit"] = c.get("fit")
    cal_info["true"] = {k: true_cam[k] for k in ("model", "f_px", "cx", "cy", "theta_max_deg", "yaw_deg", "tilt_deg")}
    cal_info["true_euler_ours"] = dict(zip(("roll_deg", "pitch_deg", "yaw_deg"), euler_from_matrix(true_cam["R_cam_to_enu"])))
    res["calibration"] = cal_info
    if not os.path.exists(cal):
        res["error"] = "no calibration file; nothing replayed"
        return
    # 4. calibration error (and the conversion check for the truth camera)
    try:
        if a.camera_from == "truth":
            res["truth_conversion_check"] = verify_truth_conversion(a.bin, cal, true_cam, sc, log)
        cal_info["error"] = calibration_error(a.bin, cal, true_cam, sc, log)
        cal_info["error"]["via"] = "nephocast camera project/unproject"
        # the Python model must agree with the binary wherever the binary loads the file
        pc = PyCamera(cal_info["fields"])
        zen, az = grid_directions()
        bx, by = bin_project(a.bin, cal, zen, az, log)
        qx, qy = pc.project(zen, az)
        cal_info["python_model_max_diff_px"] = float(np.nanmax(np.hypot(bx - qx, by - qy)))
        cal_info["python_model_nan_mismatch"] = int(np.sum(np.isfinite(bx) != np.isfinite(qx)))
    except RuntimeError as e:
        cal_info["binary_refused"] = str(e)
        cal_info["error"] = calibration_error(a.bin, cal, true_cam, sc, log, pycam=PyCamera(cal_info["fields"]))
        cal_info["error"]["via"] = "Python re-implementation of src/camera.rs (the binary refuses this file)"
        f = dict(cal_info["fields"])
        if f.get("f_px_per_rad", 1) < 0:
            # -f is a half turn about the optical axis: R Rz(180°) = Rz(yaw + 180°) Ry(-pitch) Rx(-roll)
            f["f_px_per_rad"] = -f["f_px_per_rad"]
            f["yaw_deg"] = (f["yaw_deg"] + 360.0) % 360.0 - 180.0
            f["pitch_deg"], f["roll_deg"] = -f["pitch_deg"], -f["roll_deg"]
            e2 = calibration_error(a.bin, cal, true_cam, sc, log, pycam=PyCamera(f))
            cal_info["equivalent_positive_f"] = dict(f_px_per_rad=f["f_px_per_rad"], yaw_deg=f["yaw_deg"],
                                                     pitch_deg=f["pitch_deg"], roll_deg=f["roll_deg"],
                                                     deg_p95_z_lt_80=e2["deg_p95_z_lt_80"],
                                                     max_diff_vs_written_px=float(np.nanmax(np.hypot(
                                                         *(np.subtract(PyCamera(f).project(*grid_directions()),
                                                                       PyCamera(cal_info["fields"]).project(*grid_directions())))))))
    if a.camera_from == "calibrate":
        dets = os.path.join(work, "cal-detections.csv")
        if os.path.exists(dets):
            cal_info["detection_lean"] = detection_lean(dets, [os.path.join(d, "truth", "truth.csv") for d in (clear, cloudy)], true_cam)
    if a.calibration_only:
        return
    # 1./2. site files and measurements
    res["cbh_m"] = write_site(site_cloudy, site_json, ceil(cloudy), cal, pyr, a.set)
    write_site(site_clear, read_json(os.path.join(clear, "input", "site.json")), ceil(clear), cal, pyr)
    meas = os.path.join(work, "measurements.csv")
    tpc = os.path.join(cloudy, "truth", "truth_points.csv")
    res["measurement_rows"] = 0 if a.no_measurements else (
        write_measurements(meas, tpc, pyr, a.causal_measurements, a.measurement_minutes, a.measurement_shift_min) if os.path.exists(tpc) else 0)
    # 5./6. replays
    for key, scene_dir, site, m in (("cloudy", cloudy, site_cloudy, meas if res["measurement_rows"] else None),
                                    ("clear", clear, site_clear, None)):
        out = os.path.join(work, f"out-{key}")
        frames = frames_of[scene_dir]
        if key == "cloudy" and a.frame_every > 1:
            frames = every_nth_frame(frames, a.frame_every, os.path.join(work, "cloudy-frames"))
        cmd = [a.bin, "replay", "--site", site, "--frames", frames, "--out", out, "--quiet"]
        if m:
            cmd += ["--measurements", m]
        rc, so, se = run(cmd, log=log)
        r = dict(exit_code=rc, stdout=so[-3000:], stderr=se[-3000:])
        res[f"replay_{key}"] = r
        if rc != 0:
            continue
        files = convert_replay(out, os.path.join(work, f"scored-{key}"), a.ramp_min_probability)
        r["converted"] = files
        sj = score(a.scenes, scene_dir, files if key == "cloudy" else {"forecast": files["forecast"]},
                   os.path.join(work, f"score-{key}.json"), log)
        r["score"] = sj
        r["forecast_summary"] = forecast_summary(sj, yard.get(os.path.basename(scene_dir)))
        if key == "cloudy":
            r["motion_summary"] = motion_summary(files.get("motion"), scene_dir)


def sun_zenith_deg(names, site):
    """The sun's zenith angle [deg] at each frame's time (its name, UTC) at the site of
    ``input/site.json`` (pvlib's SPA; refraction left out)."""
    import pvlib
    t = pd.to_datetime([n[:15] for n in names], format="%Y%m%dT%H%M%S", utc=True)
    sp = pvlib.solarposition.get_solarposition(t, site["latitude"], site["longitude"], site.get("altitude_m", 0.0))
    return sp["zenith"].to_numpy()


def clear_frames_subset(frames, subset, out, site=None, low_sun_zenith_deg=LOW_SUN_MIN_ZENITH_DEG):
    """The clear day's frames that ``calibrate`` sees: all of them, or a part of the day, linked into
    ``out``. A user may have only a morning, or frames every 15 min: the calibration must hold up on
    those too (frame names carry the UTC time, ``YYYYMMDDTHHMMSSZ.jpg``; morning/afternoon split at
    12:00 UTC, midday is 09:00-15:00 UTC, every3 keeps every third frame). ``low-sun`` keeps the
    frames whose sun is lower than zenith ``low_sun_zenith_deg`` (50° by default; ``site``: the
    ``site`` table of ``input/site.json``):
    a low arc, as a winter day gives, where the sun never climbs out of its bloom."""
    if subset == "all":
        return frames
    names = sorted(n for n in os.listdir(frames) if n.endswith(".jpg"))
    hour = lambda n: n[9:11]  # noqa: E731
    if subset == "low-sun":
        if site is None:
            raise ValueError("the low-sun subset needs the site's latitude and longitude")
        zen = sun_zenith_deg(names, site)
        keep = [n for n, z in zip(names, zen) if z > low_sun_zenith_deg]
    else:
        keep = {"morning": [n for n in names if hour(n) < "12"],
                "afternoon": [n for n in names if hour(n) >= "12"],
                "midday": [n for n in names if "09" <= hour(n) < "15"],
                "every3": names[::3]}[subset]
    os.makedirs(out, exist_ok=True)
    for n in keep:
        os.symlink(os.path.join(frames, n), os.path.join(out, n))
    return out


def with_cloudy_frames(frames, cloudy_frames, every, out):
    """The calibration day's frames plus every `every`-th frame of the cloudy scene, linked into
    `out`: a "clear day" that is not wholly clear (the same camera; the cloudy scene's frames carry
    their own times). Returns the folder and how many cloudy frames were added."""
    if os.path.isdir(out):
        shutil.rmtree(out)
    os.makedirs(out)
    for n in sorted(x for x in os.listdir(frames) if x.endswith(".jpg")):
        os.symlink(os.path.realpath(os.path.join(frames, n)), os.path.join(out, n))
    added = sorted(x for x in os.listdir(cloudy_frames) if x.endswith(".jpg"))[::every]
    for n in added:
        if os.path.exists(os.path.join(out, n)):
            raise RuntimeError(f"{n} is in both the clear day and the cloudy scene")
        os.symlink(os.path.realpath(os.path.join(cloudy_frames, n)), os.path.join(out, n))
    return out, len(added)


def static_paint(a, clear, true_cam, frames_of):
    """The `--pole` / `--reflection` probe (a StaticPaint) for this camera, or None."""
    if not a.pole and not a.reflection:
        return None
    t = pd.read_csv(os.path.join(clear, "truth", "truth.csv"))
    t = t[(t.sun_zenith_deg < 80) & t.sun_px_x.notna()].sort_values("time")
    poles = []
    for spec in a.pole:
        v = [float(x) for x in spec.split(":")]
        if len(v) not in (2, 3) or not 0 <= v[0] <= 1 or v[1] <= 0:
            raise ValueError(f"--pole {spec}: FRAC:WIDTH_PX[:ANGLE_DEG], FRAC in 0..1")
        poles.append((v[0], v[1], v[2] if len(v) == 3 else 0.0))
    names = set()
    for d in frames_of.values():
        names |= {x for x in os.listdir(d) if x.endswith(".jpg")}
    return StaticPaint((true_cam["cx"], true_cam["cy"]), true_cam["r_max_px"], t[["sun_px_x", "sun_px_y"]].to_numpy(),
                       poles, a.reflection or None, names)


def every_nth_frame(frames, n, out):
    """Every `n`-th frame of the cloudy scene linked into `out` (a camera that takes frames less
    often; the forecasts are then issued, and scored, at those frames only)."""
    if os.path.isdir(out):
        shutil.rmtree(out)
    os.makedirs(out)
    for name in sorted(x for x in os.listdir(frames) if x.endswith(".jpg"))[::n]:
        os.symlink(os.path.join(frames, name), os.path.join(out, name))
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    here = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    ap.add_argument("--bin", default=os.path.join(here, "target", "release", "nephocast"), help="the nephocast binary")
    ds = os.environ.get("NEPHOCAST_DATASETS")
    ap.add_argument("--scenes", default=os.path.join(ds, "independent-scenes") if ds else None,
                    help="the independent-scenes folder (default $NEPHOCAST_DATASETS/independent-scenes)")
    ap.add_argument("--work", default="/tmp/indep-work", help="work folder (one subfolder per camera, overwritten)")
    ap.add_argument("--camera-from", choices=["calibrate", "truth"], default="calibrate",
                    help="calibrate on the clear day (the user's way) or convert truth/camera.json (diagnostic only)")
    ap.add_argument("--cameras", default="",
                    help="comma-separated cameras (default: every CAMERA with a CAMERA-…clear-day folder; "
                         "a camera with several cloudy scenes is run once per scene)")
    ap.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                    help="a site setting for the cloudy replay (TOML value), e.g. motion.cancelled_layer_pass=true; repeatable")
    ap.add_argument("--calibrate-set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                    help="a site setting for `calibrate` on the clear day (TOML value), e.g. segment.library_keeps_clipped=true; repeatable")
    ap.add_argument("--ramp-min-probability", type=float, default=0.3,
                    help="engine ramp events at least this probable count as warnings (default: the engine's caution level)")
    ap.add_argument("--causal-measurements", action="store_true",
                    help="stamp each 1-minute mean at the END of its minute, as many loggers do, and say so in the site "
                         "file (measurements.time_label=\"end\", unless --set gives another): the figures must then be "
                         "the start-stamped run's (the engine reads only completed minutes either way). "
                         "--set 'measurements.time_label=\"start\"' shows what a mislabelled logger costs")
    ap.add_argument("--jpeg-quality", type=int, default=0,
                    help="re-encode every frame (clear day and cloudy scene) as JPEG at this quality first (OpenCV; 0: as shipped)")
    ap.add_argument("--mirror", action="store_true",
                    help="flip every frame left-right (east on the right with north up, as a camera imaging the sky through a "
                         "mirror gives them), re-encoded at --jpeg-quality or 95; the true pixels are flipped to match. "
                         "Compare with an upright run at the same --jpeg-quality")
    ap.add_argument("--pad", default="0,0,0,0",
                    help="LEFT,TOP,RIGHT,BOTTOM pixels of black border added to every frame (negative: cut off), e.g. a "
                         "wider sensor (64,0,64,0) or a full-frame fisheye whose image circle is clipped (0,-40,0,-40); "
                         "re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--flip-vertical", action="store_true",
                    help="flip every frame upside down (--mirror is left-right only; both together are a half turn), "
                         "re-encoded at --jpeg-quality or 95, the true pixels flipped to match")
    ap.add_argument("--rotate", type=float, default=0.0, metavar="DEG",
                    help="turn every frame counter-clockwise by DEG about its centre (a camera mounted with another "
                         "azimuth about its optical axis): multiples of 90 exactly (pixels moved, not resampled), other "
                         "angles bicubic on a canvas of the same size when the true image circle still fits in it, else "
                         "on the turned frame's bounding box; re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--crop", default="0,0,0,0",
                    help="LEFT,TOP,RIGHT,BOTTOM pixels cut from every frame's edges after --pad's border (the same as a "
                         "negative --pad): a sensor that clips the image circle, e.g. a 4:3 frame from the 512² scenes "
                         "(0,48,0,48); re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--scale", type=float, default=1.0,
                    help="resize every frame by this factor (a camera of higher or lower resolution; 2: 1024²), "
                         "re-encoded at --jpeg-quality or 95, the true pixels moved to match")
    ap.add_argument("--stamp", choices=["corner", "inside", "inside-top"],
                    help="burn each frame's time into it as white text (top-left corner outside the image circle, or inside "
                         "the circle near its bottom rim), re-encoded at --jpeg-quality or 95")
    ap.add_argument("--obstruction-mask", action="store_true",
                    help="run `calibrate` with --obstruction-mask (the README's workflow), so the replays use its mask")
    ap.add_argument("--cloudy-gain", default="",
                    help="R,G,B gains applied to the cloudy scene's frames only (the clear day as shipped): a camera whose "
                         "exposure or white balance differs between the calibration day and the day forecast, e.g. 0.8,0.8,0.8 "
                         "or 1.08,1,0.93 (warmer); re-encoded at --jpeg-quality or 95")
    ap.add_argument("--frame-every", type=int, default=1,
                    help="replay only every N-th frame of the cloudy scene (a camera taking frames N times less often)")
    ap.add_argument("--measurement-minutes", type=int, default=1,
                    help="the synthetic pyranometers' averaging period [min] (default 1; plants often log 5- or 15-minute means)")
    ap.add_argument("--measurement-shift-min", type=int, default=0,
                    help="add this many minutes to every measurement time stamp (a logger clock that is off: 60 is "
                         "a logger on local time an hour ahead of UTC, the readings an hour late)")
    ap.add_argument("--no-ceilometer", action="store_true",
                    help="ignore input/ceilometer.json, as a site without one: no base is configured, and the engine "
                         "estimates it by shadow timing at the pyranometers (without measurements it keeps its 1500 m prior)")
    ap.add_argument("--no-measurements", action="store_true",
                    help="replay the cloudy scene without pyranometer readings (a plant without them: the "
                         "engine's documented default transmittances)")
    ap.add_argument("--calibration-only", action="store_true",
                    help="stop after measuring the calibration (steps 3-4 and the detections' lean); no replays")
    ap.add_argument("--clear-subset", choices=CLEAR_SUBSETS, default="all",
                    help="calibrate from part of the clear day only (robustness check; the clear-day replay keeps every frame); "
                         "low-sun keeps the frames whose sun is lower than --low-sun-zenith-deg (a winter day's low arc)")
    ap.add_argument("--low-sun-zenith-deg", type=float, default=LOW_SUN_MIN_ZENITH_DEG,
                    help="with --clear-subset low-sun, the sun's zenith angle [deg] beyond which a frame is kept (default 50)")
    ap.add_argument("--calibrate-with-cloudy", type=int, default=0, metavar="EVERY_N",
                    help="give `calibrate` every N-th frame of the cloudy scene besides the clear day's (a calibration day "
                         "that is not wholly clear: cloud over and near the sun in some frames); the truth camera is the same")
    ap.add_argument("--pole", action="append", default=[], metavar="FRAC:WIDTH_PX[:ANGLE_DEG]",
                    help="paint a dark opaque band (mast, pole, branch) into every frame, crossing the clear day's sun track "
                         "at share FRAC of its length, WIDTH_PX wide, ANGLE_DEG from the image-radial direction (0: a mast); "
                         "repeatable; re-encoded at --jpeg-quality or 95 (compare with a run at that quality)")
    ap.add_argument("--reflection", type=float, default=0.0, metavar="SHARE",
                    help="paint a small saturated blob that is not the sun (a reflection) into the first SHARE of the frames "
                         "(1: every frame, a static one), opposite the noon sun at 0.55 radii; re-encoded as --pole")
    ap.add_argument("--json", help="write every number here")
    a = ap.parse_args()
    pad = tuple(int(v) for v in a.pad.split(","))
    crop = tuple(int(v) for v in a.crop.split(","))
    if len(pad) != 4 or len(crop) != 4:
        ap.error("--pad and --crop take four integers: LEFT,TOP,RIGHT,BOTTOM")
    if min(crop) < 0:
        ap.error("--crop takes pixels to cut (not negative; --pad adds a border)")
    a.pad_total = tuple(p - c for p, c in zip(pad, crop))
    if a.causal_measurements and not any(kv.split("=", 1)[0].strip() == "measurements.time_label" for kv in a.set):
        a.set.append('measurements.time_label="end"')
    if not a.scenes or not os.path.isdir(a.scenes):
        print(f"independent scenes not found ({a.scenes or '$NEPHOCAST_DATASETS is not set'}); nothing to check. "
              "Pass --scenes DIR or set NEPHOCAST_DATASETS.")
        return 0
    if not os.path.isfile(a.bin):
        print(f"no nephocast binary at {a.bin}; build it (cargo build --release) or pass --bin", file=sys.stderr)
        return 2
    a.scenes, a.work, a.bin = os.path.abspath(a.scenes), os.path.abspath(a.work), os.path.abspath(a.bin)
    sys.path.insert(0, a.scenes)
    import skycommon as sc  # noqa: E402  (the dataset's own camera model, for scoring only)

    yard = yardsticks(a.scenes)
    log = []
    results = []
    text = (f"# nephocast on the independent scenes (camera from `{a.camera_from}`, binary {a.bin}; measurements "
            f"{a.measurement_minutes}-minute means stamped at the {'end' if a.causal_measurements else 'start'} of each period"
            f"{f', every stamp moved by {a.measurement_shift_min:+d} min' if a.measurement_shift_min else ''}"
            f"{'; NO measurements given to the cloudy replay' if a.no_measurements else ''})\n\n")
    cameras = [c.strip() for c in a.cameras.split(",") if c.strip()] if a.cameras else discover_cameras(a.scenes)
    for camera in cameras:
        try:
            cloudy = [os.path.basename(d) for d in camera_folders(a.scenes, camera)[1]]
        except Exception as e:  # say what is missing and go on with the other cameras
            cloudy = [None]
        for scene in cloudy:
            print(f"[{camera}{' ' + scene if scene and len(cloudy) > 1 else ''}] running ...", file=sys.stderr, flush=True)
            r = dict(camera=camera, camera_from=a.camera_from)
            if scene and len(cloudy) > 1:
                r["cloudy_scene"] = scene
            try:
                run_camera(a, camera, sc, yard, log, r)
            except Exception as e:  # keep going with the other cameras and scenes, say what broke
                r["error"] = f"{type(e).__name__}: {e}"
            results.append(r)
            text += markdown(r) + "\n"
    text += summary_table(results)
    print(text)
    if a.json:
        with open(a.json, "w") as f:
            json.dump(dict(camera_from=a.camera_from, causal_measurements=a.causal_measurements, mirror=a.mirror, pad=a.pad, scale=a.scale,
                           flip_vertical=a.flip_vertical, rotate_deg=a.rotate, crop=a.crop,
                           stamp=a.stamp, measurement_shift_min=a.measurement_shift_min, bin=a.bin, scenes=a.scenes, yardsticks=yard,
                           commands=log, cameras=results, summary_markdown=text), f, indent=1, default=str)
    return 0


if __name__ == "__main__":
    sys.exit(main())
