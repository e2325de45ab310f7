"""Frame probes of tools/independent_scenes.py: the frames re-encoded, with the geometry of another
camera (mirrored, flipped upside down, rotated about the image centre, resized, padded or cut) or
another exposure, and the same geometry applied to the true camera so that the calibration can
still be measured against the truth.

The geometry is one affine map of pixel coordinates (pixel centres at integer coordinates, x right,
y down), composed in the order the frames are changed: left-right mirror, vertical flip, rotation,
resize, border (pad, negative: cut). The truth files are never changed; the true pixels are moved.
"""
import math
import os

import numpy as np


class FrameGeometry:
    """How a frame of `width` x `height` pixels is changed, and where a pixel ends up."""

    def __init__(self, width, height, mirror=False, flip_vertical=False, rotate_deg=0.0, scale=1.0,
                 pad=(0, 0, 0, 0), circle=None):
        """`circle` (cx, cy, radius) [px] is the true image circle, used only to choose the rotated
        frame's canvas: the same size when the rotated circle still fits in it, else the rotated
        frame's whole bounding box (nothing of the sky is lost either way)."""
        self.in_size = (int(width), int(height))
        self.mirror, self.flip_vertical = bool(mirror), bool(flip_vertical)
        self.rotate_deg, self.scale, self.pad = float(rotate_deg), float(scale), tuple(int(v) for v in pad)
        w, h = self.in_size
        A = np.eye(3)
        if mirror:
            A = np.array([[-1, 0, w - 1], [0, 1, 0], [0, 0, 1]], float) @ A
        if flip_vertical:
            A = np.array([[1, 0, 0], [0, -1, h - 1], [0, 0, 1]], float) @ A
        self.rot_matrix, self.rot_size = None, (w, h)
        if self.rotate_deg % 360.0 != 0.0:
            R, (w, h) = self._rotation(w, h, A, circle)
            self.rot_matrix, self.rot_size = R, (w, h)
            A = R @ A
        if self.scale != 1.0:
            s = self.scale
            A = np.array([[s, 0, 0.5 * s - 0.5], [0, s, 0.5 * s - 0.5], [0, 0, 1]]) @ A
            w, h = round(w * s), round(h * s)
        l, t, r, b = self.pad
        A = np.array([[1, 0, l], [0, 1, t], [0, 0, 1]], float) @ A
        self.size = (w + l + r, h + t + b)
        if self.size[0] < 16 or self.size[1] < 16:
            raise ValueError(f"the probes leave a frame of {self.size[0]}x{self.size[1]} px")
        self.A = A

    def _rotation(self, w, h, A, circle):
        """The rotation's affine map (counter-clockwise as the frame is seen, by `rotate_deg`, about
        the frame's centre) and the canvas size."""
        th = math.radians(self.rotate_deg)
        c, s = math.cos(th), math.sin(th)
        if abs(c) < 1e-12:
            c = 0.0
        if abs(s) < 1e-12:
            s = 0.0
        # y is down, so a counter-clockwise turn as seen is x' = c x + s y, y' = -s x + c y (OpenCV's).
        L = np.array([[c, s], [-s, c]])
        ox, oy = (w - 1) / 2.0, (h - 1) / 2.0
        corners = np.array([[-ox, -oy], [ox, -oy], [-ox, oy], [ox, oy]]) @ L.T
        bw = int(round(np.ptp(corners[:, 0]) + 1))
        bh = int(round(np.ptp(corners[:, 1]) + 1))
        nw, nh = bw, bh
        if circle is not None and self.rotate_deg % 90.0 != 0.0:
            cx, cy = (A @ [circle[0], circle[1], 1.0])[:2]
            rx, ry = L @ [cx - ox, cy - oy]
            rx, ry = rx + ox, ry + oy
            if circle[2] <= min(rx, ry, w - 1 - rx, h - 1 - ry):
                nw, nh = w, h
        nox, noy = (nw - 1) / 2.0, (nh - 1) / 2.0
        R = np.eye(3)
        R[:2, :2] = L
        R[:2, 2] = [nox, noy] - L @ [ox, oy]
        return R, (nw, nh)

    @property
    def changed(self):
        return self.mirror or self.flip_vertical or self.rot_matrix is not None or self.scale != 1.0 or any(self.pad)

    def tag(self):
        """A short name of the geometry for work folders."""
        t = ("-mirrored" if self.mirror else "") + ("-flipv" if self.flip_vertical else "")
        t += f"-rot{self.rotate_deg:g}" if self.rot_matrix is not None else ""
        t += f"-x{self.scale:g}" if self.scale != 1.0 else ""
        return t + ("-pad" if any(self.pad) else "")

    def points(self, x, y, inside=True):
        """Move true pixels (x, y) to the changed frame; with `inside`, NaN where they fall off it."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        nx = self.A[0, 0] * x + self.A[0, 1] * y + self.A[0, 2]
        ny = self.A[1, 0] * x + self.A[1, 1] * y + self.A[1, 2]
        if inside:
            ok = (nx >= -0.5) & (ny >= -0.5) & (nx < self.size[0] - 0.5) & (ny < self.size[1] - 0.5)
            nx, ny = np.where(ok, nx, np.nan), np.where(ok, ny, np.nan)
        return nx, ny

    def camera_change(self):
        """How the change acts on a camera model pixel = c + f g(theta) P (v_x, v_y) / |v_xy| with
        v = R^T d and P = diag(-1, 1) when mirrored: (f factor, mirrored, alpha) such that the
        changed camera has f' = f * factor, mirrored' = mirrored, R' = R Rz(-alpha), the
        principal point moved by `points`. For an upright (unmirrored) camera."""
        L = self.A[:2, :2]
        det = float(np.linalg.det(L))
        k = math.sqrt(abs(det))
        Q = L / k
        mirrored = det < 0
        N = np.diag([-1.0, 1.0]) @ Q if mirrored else Q
        return k, mirrored, math.degrees(math.atan2(N[1, 0], N[0, 0]))

    def apply(self, img):
        """The geometric change of a decoded frame up to (not including) resize and border; see
        `finish` for those."""
        import cv2
        if self.mirror:
            img = cv2.flip(img, 1)
        if self.flip_vertical:
            img = cv2.flip(img, 0)
        if self.rot_matrix is not None:
            q = self.rotate_deg % 360.0
            exact = {90.0: cv2.ROTATE_90_COUNTERCLOCKWISE, 180.0: cv2.ROTATE_180, 270.0: cv2.ROTATE_90_CLOCKWISE}
            if q in exact and self.rot_size == (img.shape[1], img.shape[0])[:: 1 if q == 180.0 else -1]:
                img = cv2.rotate(img, exact[q])  # lossless
            else:
                img = cv2.warpAffine(img, self.rot_matrix[:2], self.rot_size, flags=cv2.INTER_CUBIC,
                                     borderMode=cv2.BORDER_CONSTANT, borderValue=(0, 0, 0))
        return img

    def resize_and_border(self, img, stamp_fn=None):
        import cv2
        if self.scale != 1.0:
            img = cv2.resize(img, (round(img.shape[1] * self.scale), round(img.shape[0] * self.scale)),
                             interpolation=cv2.INTER_AREA if self.scale < 1 else cv2.INTER_CUBIC)
        if stamp_fn:
            img = stamp_fn(img)
        if any(self.pad):
            l, t, r, b = self.pad
            img = img[max(0, -t):img.shape[0] - max(0, -b), max(0, -l):img.shape[1] - max(0, -r)]
            img = cv2.copyMakeBorder(img, max(0, t), max(0, b), max(0, l), max(0, r), cv2.BORDER_CONSTANT, value=(0, 0, 0))
        return img


def reencoded(frames, quality, out, geom=None, stamp=None, gains=None, paint=None):
    """The frames decoded and encoded again as JPEG at `quality` (OpenCV), into `out`: a camera set
    to compress harder (or softer) than the scenes' own; with `geom` (a FrameGeometry), mirrored,
    flipped, rotated, resized (OpenCV, area averaging down, bicubic up) and given black borders or
    cut; with `stamp` ("corner", "inside" or "inside-top"), the frame's time burnt in as white text,
    in the top-left corner outside the image circle or inside the circle near its bottom (top) rim,
    as many cameras do; with `paint` (a StaticPaint), fixed structure painted in first; with `gains` (R, G, B), each channel multiplied (clipped at 255): another
    exposure or white balance. Pixels clipped in every channel (all at least 250: the sun and its
    bloom, far brighter than the sensor's saturation) stay white, as a camera's clipped highlights do
    whatever its gains (a gain below 1 on the decoded values would otherwise leave the sun's disk
    short of clipping in that channel)."""
    import cv2
    os.makedirs(out, exist_ok=True)
    for name in sorted(x for x in os.listdir(frames) if x.endswith(".jpg")):
        img = cv2.imread(os.path.join(frames, name), cv2.IMREAD_COLOR)
        if paint is not None:
            img = paint(img, name)
        if geom is not None:
            img = geom.apply(img)
        if gains:
            clipped = (img >= 250).all(axis=2)
            img = np.clip(img.astype(np.float32) * np.array(gains[::-1], np.float32), 0, 255).round().astype(np.uint8)
            img[clipped] = 255

        def stamped(img, name=name):
            text = f"{name[0:4]}-{name[4:6]}-{name[6:8]} {name[9:11]}:{name[11:13]}:{name[13:15]}"
            hh, ww = img.shape[:2]
            org = (5, 20) if stamp == "corner" else (int(0.29 * ww), int(0.92 * hh)) if stamp == "inside" else (int(0.29 * ww), int(0.10 * hh))
            cv2.putText(img, text, org, cv2.FONT_HERSHEY_SIMPLEX, 0.5 * ww / 512, (255, 255, 255), 2)
            return img

        if geom is not None:
            img = geom.resize_and_border(img, stamped if stamp else None)
        elif stamp:
            img = stamped(img)
        cv2.imwrite(os.path.join(out, name), img, [cv2.IMWRITE_JPEG_QUALITY, int(quality)])
    return out


class StaticPaint:
    """Fixed structure painted into every frame (clear day and cloudy scene), in the scene's own
    pixel coordinates before any geometry probe: what stands in the sky imager's view and does not
    move.

    * poles: dark opaque bands (a mast, a pole or a branch) crossing the sun's track, each
      ``(frac, width_px, angle_deg)``: through the point of the clear day's sun track (true sun
      pixels with the sun at zenith < 80°, in time order) at share ``frac`` of its length, at
      ``angle_deg`` from the image-radial direction there (0: radial, as a vertical mast images
      in a level fisheye; a branch leans), from the image circle's rim inward to 0.35 radii past
      the track; pixels within ``width_px / 2`` of that segment take the silhouette's colour, with
      a 1-px soft edge. The sun is hidden in the frames where its disc lies under the band and
      half hidden where the band cuts its glare.
    * reflection: a small saturated blob (radius 3 px, a 3-px soft halo) that is not the sun, at
      0.55 radii from the centre on the side of the image opposite the noon sun; in every frame
      (``share`` 1: static, a chrome fitting) or in the first ``share`` of the frames in time order
      (a glint while the sun lights a window).

    The track is read from truth.csv (the probe's construction only; the engine never sees it)."""

    SILHOUETTE = np.array([22, 24, 26], np.float32)  # BGR, a dark grey mast against the sky

    def __init__(self, centre, radius, track, poles=(), reflection_share=None, names=()):
        self.centre, self.radius = np.asarray(centre, float), float(radius)
        track = np.asarray(track, float)
        seg = np.hypot(*np.diff(track, axis=0).T)
        s = np.concatenate([[0.0], np.cumsum(seg)])
        self.segments = []
        for frac, width, angle in poles:
            p = np.array([np.interp(frac * s[-1], s, track[:, 0]), np.interp(frac * s[-1], s, track[:, 1])])
            radial = (p - self.centre) / np.linalg.norm(p - self.centre)
            a = math.radians(angle)
            u = np.array([radial[0] * math.cos(a) - radial[1] * math.sin(a), radial[0] * math.sin(a) + radial[1] * math.cos(a)])
            # from 0.35 radii inward of the track point out to where the line leaves the image circle
            d = p - self.centre
            b = float(d @ u)
            out = -b + math.sqrt(max(b * b - (d @ d - self.radius ** 2), 0.0))
            self.segments.append((p - 0.35 * self.radius * u, p + out * u, float(width)))
        self.reflection = None
        if reflection_share:
            noon = track[np.argmin(np.hypot(*(track - self.centre).T))]
            away = self.centre - noon
            n = np.linalg.norm(away)
            away = away / n if n > 1e-6 else np.array([0.0, 1.0])
            self.reflection = self.centre + 0.55 * self.radius * away
            names = sorted(names)
            self.reflection_frames = set(names[: max(1, int(round(reflection_share * len(names))))])

    def tag(self):
        return ("-pole" if self.segments else "") + ("-glint" if self.reflection is not None else "")

    def __call__(self, img, name):
        h, w = img.shape[:2]
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        out = img.astype(np.float32)
        for a, b, width in self.segments:
            ab = b - a
            t = np.clip(((xx - a[0]) * ab[0] + (yy - a[1]) * ab[1]) / float(ab @ ab), 0.0, 1.0)
            dist = np.hypot(xx - (a[0] + t * ab[0]), yy - (a[1] + t * ab[1]))
            cover = np.clip(width / 2.0 + 0.5 - dist, 0.0, 1.0)[..., None]
            out = out * (1 - cover) + self.SILHOUETTE * cover
        if self.reflection is not None and name in self.reflection_frames:
            dist = np.hypot(xx - self.reflection[0], yy - self.reflection[1])
            glow = np.clip((6.0 - dist) / 3.0, 0.0, 1.0)[..., None]
            out = np.maximum(out, out * (1 - glow) + 255.0 * glow)
            out[dist <= 3.0] = 255.0
        return np.clip(out, 0, 255).round().astype(np.uint8)
