"""Camera models and calibration checks of tools/independent_scenes.py: the true camera of the
scenes' ``truth/camera.json`` (PyCamera), its conversion to nephocast's calibration file, the
direction error of a calibration against it measured through ``nephocast camera project`` /
``unproject``, and the lean of the sun detections ``calibrate`` used; plus the small helpers the
harness shares (running a command, TOML text, JSON)."""
import json
import math
import subprocess

import numpy as np
import pandas as pd

BANDS = [(0, 40), (40, 50), (50, 60), (60, 70), (70, 80), (80, 88.0001)]
BAND_NAMES = ["<40", "40-50", "50-60", "60-70", "70-80", "80-88"]


# ------------------------------------------------------------------ small helpers
def run(cmd, stdin=None, log=None):
    """Run a command; return (exit code, stdout, stderr). Logs the command line."""
    if log is not None:
        log.append(" ".join(str(c) for c in cmd))
    p = subprocess.run([str(c) for c in cmd], input=stdin, capture_output=True, text=True)
    return p.returncode, p.stdout, p.stderr


def toml_value(v):
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return repr(float(v)) if isinstance(v, float) else str(v)


def toml_table(name, d, array=False):
    head = f"[[{name}]]" if array else f"[{name}]"
    return head + "\n" + "".join(f"{k} = {toml_value(v)}\n" for k, v in d.items()) + "\n"


def read_json(p):
    with open(p) as f:
        return json.load(f)


def fnum(x, fmt="{:.2f}"):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "—"
    return fmt.format(x)

# ------------------------------------------------------------------ camera models
def euler_from_matrix(R):
    """(roll, pitch, yaw) [deg] with R = Rz(yaw) Ry(pitch) Rx(roll) (nalgebra's from_euler_angles)."""
    R = np.asarray(R, float)
    pitch = -math.asin(max(-1.0, min(1.0, R[2, 0])))
    roll = math.atan2(R[2, 1], R[2, 2])
    yaw = math.atan2(R[1, 0], R[0, 0])
    return math.degrees(roll), math.degrees(pitch), math.degrees(yaw)


def matrix_from_euler(roll, pitch, yaw):
    r, p, y = (math.radians(a) for a in (roll, pitch, yaw))
    Rx = np.array([[1, 0, 0], [0, math.cos(r), -math.sin(r)], [0, math.sin(r), math.cos(r)]])
    Ry = np.array([[math.cos(p), 0, math.sin(p)], [0, 1, 0], [-math.sin(p), 0, math.cos(p)]])
    Rz = np.array([[math.cos(y), -math.sin(y), 0], [math.sin(y), math.cos(y), 0], [0, 0, 1]])
    return Rz @ Ry @ Rx


# Set per camera from --mirror, --flip-vertical, --rotate, --scale, --pad and --crop: how the frames
# the engine reads were changed (tools/scene_probes.py), so that every true pixel can be moved to
# match (the truth files themselves are never changed). None: the frames as shipped.
GEOM = None


def true_pixels(sc, true_cam, d):
    """The true camera's pixels of directions `d`, moved as the probes moved the frames (NaN where
    the changed frame no longer holds them)."""
    tx, ty = sc.project_enu(true_cam, d)
    return GEOM.points(tx, ty) if GEOM is not None else (tx, ty)


def calibration_from_truth(cam):
    """truth/camera.json -> the [camera] table of a nephocast calibration file (of the frames as the
    probes changed them: a mirror or flip sets `mirrored`, a turn of the frame turns the camera
    about its optical axis, a resize scales the focal length)."""
    roll, pitch, yaw = euler_from_matrix(cam["R_cam_to_enu"])
    c = calibration_from_truth_upright(cam, roll, pitch, yaw)
    if GEOM is None:
        return c
    k, mirrored, alpha = GEOM.camera_change()
    R = np.asarray(cam["R_cam_to_enu"], float) @ matrix_from_euler(0.0, 0.0, -alpha)
    roll, pitch, yaw = euler_from_matrix(R)
    cx, cy = GEOM.points([cam["cx"]], [cam["cy"]], inside=False)
    c.update(cx_px=float(cx[0]), cy_px=float(cy[0]), f_px_per_rad=c["f_px_per_rad"] * k, width_px=GEOM.size[0],
             height_px=GEOM.size[1], yaw_deg=yaw, pitch_deg=pitch, roll_deg=roll)
    if mirrored:
        c["mirrored"] = True
    return c


def calibration_from_truth_upright(cam, roll, pitch, yaw):
    return {
        "name": f"{cam.get('camera_id', 'camera')}-from-truth",
        "width_px": int(cam["width"]),
        "height_px": int(cam["height"]),
        "model": cam["model"],
        "f_px_per_rad": float(cam["f_px"]),
        "cx_px": float(cam["cx"]),
        "cy_px": float(cam["cy"]),
        "max_field_angle_deg": float(cam["theta_max_deg"]),
        "yaw_deg": yaw,
        "pitch_deg": pitch,
        "roll_deg": roll,
    }


def placeholder_calibration(width, height):
    """A level, centred equidistant camera: only so that `calibrate` can load its site file."""
    c = (width - 1) / 2.0
    return {"name": "placeholder", "width_px": int(width), "height_px": int(height), "model": "equidistant",
            "f_px_per_rad": (min(width, height) / 2.0 - 1.0) / (math.pi / 2), "cx_px": c, "cy_px": (height - 1) / 2.0,
            "max_field_angle_deg": 90.0, "yaw_deg": 0.0, "pitch_deg": 0.0, "roll_deg": 0.0}


class PyCamera:
    """The engine's camera model (src/camera.rs) re-implemented, used only to measure a calibration
    file the binary refuses to load (e.g. a negative focal length written by `calibrate`)."""

    def __init__(self, c):
        self.c = c
        self.R = matrix_from_euler(c.get("roll_deg", 0.0), c.get("pitch_deg", 0.0), c.get("yaw_deg", 0.0))
        self.k = (list(c.get("k") or []) + [0.0] * 4)[:4]
        self.fmax = math.radians(c.get("max_field_angle_deg", 90.0))

    def g(self, t):
        m = self.c["model"]
        if m == "equidistant":
            return t
        if m == "equisolid":
            return 2 * np.sin(t / 2)
        if m == "stereographic":
            return 2 * np.tan(t / 2)
        t2 = t * t
        k = self.k
        return t * (1 + t2 * (k[0] + t2 * (k[1] + t2 * (k[2] + t2 * k[3]))))

    def g_inv(self, rho):
        m = self.c["model"]
        if m == "equidistant":
            return rho
        if m == "equisolid":
            return np.where(rho <= 2, 2 * np.arcsin(np.clip(rho / 2, -1, 1)), np.nan)
        if m == "stereographic":
            return 2 * np.arctan(rho / 2)
        t = np.array(rho, float)
        for _ in range(60):  # Newton, as the engine does
            h = 1e-7
            d = (self.g(t + h) - self.g(t - h)) / (2 * h)
            t = t - (self.g(t) - rho) / d
        return np.where(np.abs(self.g(t) - rho) < 1e-8, t, np.nan)

    def project(self, zen, az):
        v = enu(zen, az) @ self.R  # R^T d
        if self.c.get("mirrored"):
            v[:, 0] = -v[:, 0]
        th = np.arccos(np.clip(v[:, 2], -1, 1))
        rxy = np.hypot(v[:, 0], v[:, 1])
        r = self.c["f_px_per_rad"] * self.g(th)
        with np.errstate(invalid="ignore", divide="ignore"):
            x = self.c["cx_px"] + np.where(rxy > 0, r * v[:, 0] / rxy, 0.0)
            y = self.c["cy_px"] + np.where(rxy > 0, r * v[:, 1] / rxy, 0.0)
        ok = (th <= self.fmax) & (x >= -0.5) & (y >= -0.5) & (x < self.c["width_px"] - 0.5) & (y < self.c["height_px"] - 0.5)
        return np.where(ok, x, np.nan), np.where(ok, y, np.nan)

    def unproject(self, x, y):
        f = self.c["f_px_per_rad"]
        dx, dy = (np.asarray(x) - self.c["cx_px"]) / f, (np.asarray(y) - self.c["cy_px"]) / f
        rho = np.hypot(dx, dy)
        th = self.g_inv(rho)
        with np.errstate(invalid="ignore", divide="ignore"):
            v = np.stack([np.sin(th) * np.where(rho > 0, dx / rho, 0), np.sin(th) * np.where(rho > 0, dy / rho, 0), np.cos(th)], -1)
        if self.c.get("mirrored"):
            v[:, 0] = -v[:, 0]
        w = v @ self.R.T
        w[~(th <= self.fmax)] = np.nan
        zen = np.degrees(np.arccos(np.clip(w[:, 2], -1, 1)))
        az = np.degrees(np.arctan2(w[:, 0], w[:, 1])) % 360
        return np.where(np.isfinite(w[:, 2]), zen, np.nan), np.where(np.isfinite(w[:, 2]), az, np.nan)


def grid_directions():
    """Sky directions: zenith 0..88 step 2, azimuth 0..358 step 4 (degrees)."""
    z, a = np.meshgrid(np.arange(0, 89, 2.0), np.arange(0, 360, 4.0), indexing="ij")
    return z.ravel(), a.ravel()


def enu(zen, az):
    z, a = np.radians(zen), np.radians(az)
    return np.stack([np.sin(z) * np.sin(a), np.sin(z) * np.cos(a), np.cos(z)], axis=-1)


def bin_project(binary, cal, zen, az, log):
    """`camera project`: zenith/azimuth rows -> (x, y) arrays, NaN where the camera says outside."""
    text = "zenith_deg,azimuth_deg\n" + "".join(f"{z:.6f},{a:.6f}\n" for z, a in zip(zen, az))
    return _bin_pairs(binary, ["camera", "project", "--calibration", cal], text, len(zen), log)


def bin_unproject(binary, cal, x, y, log):
    text = "x_px,y_px\n" + "".join(f"{a:.6f},{b:.6f}\n" for a, b in zip(x, y))
    return _bin_pairs(binary, ["camera", "unproject", "--calibration", cal], text, len(x), log)


def _bin_pairs(binary, args, text, n, log):
    rc, out, err = run([binary, *args], stdin=text, log=log)
    if rc != 0:
        raise RuntimeError(f"{' '.join(args[:2])} exited {rc}: {err.strip()}")
    lines = [ln for ln in out.splitlines() if ln.strip()][1:]  # first line is the header
    if len(lines) != n:
        raise RuntimeError(f"{' '.join(args[:2])}: expected {n} rows, got {len(lines)}")
    a = np.full(n, np.nan)
    b = np.full(n, np.nan)
    for i, ln in enumerate(lines):
        p, q = ln.split(",")
        if p.strip():
            a[i], b[i] = float(p), float(q)
    return a, b


def calibration_error(binary, cal, true_cam, sc, log, pycam=None):
    """Pixel and angular error of calibration `cal` against the true camera, per zenith band
    (with `nephocast camera project/unproject`, or with `pycam` when the binary refuses the file)."""
    zen, az = grid_directions()
    d = enu(zen, az)
    tx, ty = true_pixels(sc, true_cam, d)
    seen = np.isfinite(tx) & (zen <= 88.0)
    zen, az, d, tx, ty = zen[seen], az[seen], d[seen], tx[seen], ty[seen]
    if pycam is None:
        ox, oy = bin_project(binary, cal, zen, az, log)
        uz, ua = bin_unproject(binary, cal, tx, ty, log)
    else:
        ox, oy = pycam.project(zen, az)
        uz, ua = pycam.unproject(tx, ty)
    px_err = np.hypot(ox - tx, oy - ty)
    ud = enu(uz, ua)
    ang = np.degrees(np.arccos(np.clip(np.sum(ud * d, axis=1), -1, 1)))
    rows = []
    for (lo, hi), name in zip(BANDS, BAND_NAMES):
        s = (zen >= lo) & (zen < hi)
        pe, ae = px_err[s], ang[s]
        rows.append(dict(band=name, n=int(s.sum()),
                         outside_ours_project=int(np.sum(~np.isfinite(pe))),
                         outside_ours_unproject=int(np.sum(~np.isfinite(ae))),
                         px_median=_q(pe, 50), px_p95=_q(pe, 95), deg_median=_q(ae, 50), deg_p95=_q(ae, 95)))
    s80 = zen < 80
    return dict(bands=rows, deg_p95_z_lt_80=_q(ang[s80], 95), px_p95_z_lt_80=_q(px_err[s80], 95),
                n_directions=int(len(zen)), n_outside_ours=int(np.sum(~np.isfinite(ang)) + np.sum(~np.isfinite(px_err))))


def _q(v, p):
    v = v[np.isfinite(v)]
    return float(np.percentile(v, p)) if v.size else float("nan")


def verify_truth_conversion(binary, cal, true_cam, sc, log):
    """Largest |bin camera project - skycommon.project_enu| [px] over the grid the true camera sees."""
    zen, az = grid_directions()
    tx, ty = true_pixels(sc, true_cam, enu(zen, az))
    ok = np.isfinite(tx)
    ox, oy = bin_project(binary, cal, zen[ok], az[ok], log)
    e = np.hypot(ox - tx[ok], oy - ty[ok])
    return dict(max_px=float(np.nanmax(e)), n=int(ok.sum()), n_missing=int(np.sum(~np.isfinite(e))))


def detection_lean(detections_csv, truth_csvs, true_cam):
    """How the sun detections `calibrate` used sit against the true sun (a diagnostic: truth.csv's
    sun pixel, read by this script only). Offsets are split into image-radial (positive: away from
    the true principal point) and tangential parts, and summarised for the bare discs (bloom weight
    >= 0.95), the partly bloomed (0.3-0.95) and the bloomed (< 0.3), with the radial lean as a share
    of the image radius (a lean common to all detections is a focal-length error to the fit)."""
    d = pd.read_csv(detections_csv)
    t = pd.concat([pd.read_csv(p)[["time", "sun_px_x", "sun_px_y", "tau_sun_camera"]] for p in truth_csvs])
    cx, cy = true_cam["cx"], true_cam["cy"]
    if GEOM is not None:
        t["sun_px_x"], t["sun_px_y"] = GEOM.points(t["sun_px_x"].to_numpy(), t["sun_px_y"].to_numpy(), inside=False)
        (cx,), (cy,) = GEOM.points([cx], [cy], inside=False)
    m = d.merge(t, left_on="time_utc", right_on="time")
    ux, uy = m.sun_px_x - cx, m.sun_px_y - cy
    r = np.hypot(ux, uy)
    ex, ey = m.x_px - m.sun_px_x, m.y_px - m.sun_px_y
    rad, tan = (ex * ux + ey * uy) / r, (-ex * uy + ey * ux) / r
    out = {}
    for name, sel in (("bare", m.weight >= 0.95), ("partly_bloomed", (m.weight >= 0.3) & (m.weight < 0.95)), ("bloomed", m.weight < 0.3)):
        if not sel.any():
            continue
        out[name] = dict(n=int(sel.sum()), zenith_deg=[float(m.sun_zenith_deg[sel].min()), float(m.sun_zenith_deg[sel].max())],
                         radial_mean_px=float(rad[sel].mean()), radial_median_px=float(rad[sel].median()),
                         tangential_mean_px=float(tan[sel].mean()), tangential_sd_px=float(tan[sel].std()),
                         radial_share_of_radius_pct=float(100 * (rad[sel] / r[sel]).mean()))
    # Detections off the true sun by more than 2 px (a cloud edge, a pole's half-hidden glare, a
    # reflection taken for the sun), and how many were made with cloud over the sun.
    off = np.hypot(ex, ey)
    far = off > 2.0
    out["off_sun"] = dict(n=int(len(m)), n_over_2px=int(far.sum()), largest_px=float(off.max()) if len(m) else float("nan"),
                          n_cloud_over_sun=int((m.tau_sun_camera > 0).sum()),
                          over_2px_at=[f"{t} {o:.1f} px" for t, o in zip(m.time_utc[far], off[far])][:20])
    return out
