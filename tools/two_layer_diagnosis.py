#!/usr/bin/env python3
"""Where a replay's plant error comes from on a synthetic two-layer scene (a diagnostic).

Reads a `nephocast synth` sequence (``truth/irradiance.csv``: the plant's GHI, DNI and DHI at every
frame; ``truth/layers.csv``: each layer's base and wind) and a replay of it (``forecasts.csv``,
``motion.csv``), and prints:

1. motion: each tracked layer's vector per frame against the true layers' winds projected onto the
   map's plane (a layer at base ``h`` moves across the plane at ``h_plane / h`` of its wind), with
   the nearest true layer for each;
2. the current state (horizon 0) against the truth: GHI, beam on the horizontal and diffuse, RMSE
   and bias;
3. per horizon: the squared error of the forecast issued at t for t + k, split into the nowcast's
   own error at t + k (the current-state error, ``N(t+k) − T(t+k)``) and the look-up's
   (``F(t, t+k) − N(t+k)``: advection, the wrong layer's motion, cloud evolving), with their
   cross term, so that MSE = current + look-up + 2·cross;
4. with ``--layer-truth`` (from ``cargo run --release --example layer_truth``: the plant-mean DNI
   with only the lowest layer and with only the others): per horizon, the forecast's beam share
   of clear-sky DNI correlated with the truth's and with each layer's alone (which layer the
   forecast follows), and the truth's own split: how well a perfect lowest layer under a constant
   upper layer, or the reverse, would do.

    nephocast synth --scene nuisance-two-layer --seed 3 --minutes 30 --out S
    nephocast replay --site S/site.toml --frames S/frames --out O --measurements S/measurements.csv
    cargo run --release --example layer_truth -- nuisance-two-layer 3 30 > LT.csv
    python3 tools/two_layer_diagnosis.py --sequence S --replay O --layer-truth LT.csv

Standard library only.
"""
import argparse
import csv
import math
from collections import defaultdict


def read(path):
    with open(path) as f:
        return list(csv.DictReader(line for line in f if not line.startswith("#")))


def fnum(s):
    try:
        return float(s)
    except (TypeError, ValueError):
        return float("nan")


def rms(v):
    v = [x for x in v if not math.isnan(x)]
    return math.sqrt(sum(x * x for x in v) / len(v)) if v else float("nan")


def mean(v):
    v = [x for x in v if not math.isnan(x)]
    return sum(v) / len(v) if v else float("nan")


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sequence", required=True)
    ap.add_argument("--replay", required=True)
    ap.add_argument("--layer-truth", help="CSV of the layer_truth example (optional)")
    a = ap.parse_args()
    truth = {r["time_utc"]: r for r in read(f"{a.sequence}/truth/irradiance.csv") if r["target"] == "plant"}
    layers = read(f"{a.sequence}/truth/layers.csv")
    motion = read(f"{a.replay}/motion.csv")
    plane = fnum(motion[-1].get("map_plane_m")) if motion else float("nan")

    print("1. motion on the map's plane (%.0f m) against the true layers:" % plane)
    true_v = []
    for l in layers:
        h = fnum(l["base_height_m"])
        s = plane / h
        v = (fnum(l["wind_east_mps"]) * s, fnum(l["wind_north_mps"]) * s)
        true_v.append(v)
        print(f"   true layer {l['layer']} at {h:.0f} m, tau_max {l['tau_max']}: ({v[0]:.2f}, {v[1]:.2f}) m/s on the plane")
    errs = defaultdict(list)
    nearest = defaultdict(lambda: defaultdict(int))
    n_two = 0
    for r in motion:
        n = int(fnum(r["layers"]) or 0) if not math.isnan(fnum(r["layers"])) else 0
        n_two += n >= 2
        for k, (e, nn) in enumerate([("east_mps", "north_mps"), ("second_east_mps", "second_north_mps")]):
            ve, vn = fnum(r[e]), fnum(r[nn])
            if math.isnan(ve):
                continue
            d = [math.hypot(ve - t[0], vn - t[1]) for t in true_v]
            j = min(range(len(d)), key=lambda i: d[i])
            nearest[k][j] += 1
            for i, di in enumerate(d):
                errs[(k, i)].append(di)
    print(f"   frames with two layers tracked: {n_two} of {len(motion)}")
    for k, name in enumerate(["forecast's first layer", "second layer"]):
        parts = [f"against true {i}: median {sorted(errs[(k, i)])[len(errs[(k, i)]) // 2]:.2f} m/s" for i in range(len(true_v)) if errs[(k, i)]]
        print(f"   {name}: nearest true layer {dict(nearest[k])}; " + "; ".join(parts))

    fc = [r for r in read(f"{a.replay}/forecasts.csv") if r["block"] == "plant"]
    now = {r["issue_time_utc"]: r for r in fc if r["horizon_s"] == "0"}
    print("2. current state (horizon 0) against the truth [W/m2]:")
    eg, eb, ed = [], [], []
    for t, r in now.items():
        tr = truth.get(t)
        if not tr:
            continue
        g, dni, dhi = fnum(tr["ghi_wm2"]), fnum(tr["dni_wm2"]), fnum(tr["dhi_wm2"])
        cz = (g - dhi) / dni if dni > 1 else float("nan")
        eg.append(fnum(r["ghi_wm2"]) - g)
        ed.append(fnum(r["dhi_wm2"]) - dhi)
        eb.append((fnum(r["dni_wm2"]) - dni) * cz if not math.isnan(cz) else float("nan"))
    print(f"   GHI RMSE {rms(eg):.1f} bias {mean(eg):+.1f} | beam (horizontal) RMSE {rms(eb):.1f} bias {mean(eb):+.1f}"
          f" | diffuse RMSE {rms(ed):.1f} bias {mean(ed):+.1f} ({len(eg)} frames)")

    print("3. per horizon: MSE = current state at the target + look-up + 2 x cross [(W/m2)^2]")
    by_h = defaultdict(list)
    for r in fc:
        by_h[int(r["horizon_s"])].append(r)
    print("   horizon   RMSE   MSE   current  look-up  2xcross  bias  bias(current)  bias(look-up)")
    for h in sorted(by_h):
        if h % 300 or h == 0:
            continue
        cur, look, tot = [], [], []
        for r in by_h[h]:
            tgt = r["target_time_utc"]
            tr, nw = truth.get(tgt), now.get(tgt)
            if not tr or not nw:
                continue
            f, n, t = fnum(r["ghi_wm2"]), fnum(nw["ghi_wm2"]), fnum(tr["ghi_wm2"])
            cur.append(n - t)
            look.append(f - n)
            tot.append(f - t)
        m = len(tot)
        if not m:
            continue
        mse = sum(x * x for x in tot) / m
        c = sum(x * x for x in cur) / m
        lk = sum(x * x for x in look) / m
        cr = 2 * sum(x * y for x, y in zip(cur, look)) / m
        print(f"   {h // 60:>4} min {math.sqrt(mse):6.1f} {mse:7.0f} {c:7.0f} {lk:8.0f} {cr:8.0f} {mean(tot):+6.1f} {mean(cur):+8.1f} {mean(look):+12.1f}  ({m} pairs)")

    if a.layer_truth:
        layer_split(a.layer_truth, fc)


def corr(x, y):
    mx, my = mean(x), mean(y)
    sxy = sum((p - mx) * (q - my) for p, q in zip(x, y))
    sxx = sum((p - mx) ** 2 for p in x)
    syy = sum((q - my) ** 2 for q in y)
    return sxy / math.sqrt(sxx * syy) if sxx > 0 and syy > 0 else float("nan")


def layer_split(path, fc):
    lt = {r["time_utc"]: r for r in read(path)}
    print("4. beam share of clear-sky DNI, per horizon: the forecast against the truth and each layer alone")
    print("   horizon  mean(fc) mean(truth)   RMSE  corr(truth) corr(lowest alone) corr(others alone)")
    by_h = defaultdict(list)
    for r in fc:
        l = lt.get(r["target_time_utc"])
        if l and fnum(l["dni_clear_wm2"]) > 0:
            c = fnum(l["dni_clear_wm2"])
            by_h[int(r["horizon_s"])].append((fnum(r["dni_wm2"]) / c, fnum(l["dni_wm2"]) / c, fnum(l["dni_lowest_only_wm2"]) / c, fnum(l["dni_others_only_wm2"]) / c))
    for h in sorted(by_h):
        if h % 300:
            continue
        f, t, lo, hi = (list(x) for x in zip(*by_h[h]))
        print(f"   {h // 60:>4} min {mean(f):8.3f} {mean(t):11.3f} {rms([p - q for p, q in zip(f, t)]):6.3f} {corr(f, t):+11.2f} {corr(f, lo):+18.2f} {corr(f, hi):+18.2f}")
    rows = by_h.get(0, [])
    if rows:
        _, t, lo, hi = (list(x) for x in zip(*rows))
        ml, mh = mean(lo), mean(hi)
        print(f"   the truth at the frames: corr with the lowest layer alone {corr(t, lo):+.2f}, with the others alone {corr(t, hi):+.2f};"
              f" RMSE of a perfect lowest layer under constant others {rms([p * mh - q for p, q in zip(lo, t)]):.3f},"
              f" of perfect others over a constant lowest layer {rms([p * ml - q for p, q in zip(hi, t)]):.3f}")


if __name__ == "__main__":
    main()
