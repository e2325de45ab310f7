#!/usr/bin/env python3
"""Where a replay's irradiance error comes from, on an independent-renderer scene (a diagnostic).

Reads the replay's ``forecasts.csv`` and ``frames.csv`` (as ``tools/independent_scenes.py`` leaves
them in ``WORK/cameraN/out-cloudy``) and the scene's ``truth/truth.csv`` (the plant's mean GHI,
beam and diffuse at each frame) and ``truth/truth_series.csv``, and prints:

1. the horizon-0 forecast (the current state) against the truth, split into beam on the horizontal
   and diffuse, whole sequence and per 5-minute block of issue time, with the transmittances in
   use (``frames.csv``);
2. the current state's beam share of clear-sky DNI binned by the truth's;
3. per horizon (5, 10, 15 min): the RMSE, the error the nowcast made at the target time, and how
   far the forecast issued at t for t + k lies from the nowcast made at t + k (look-up and
   evolution), per 10-minute block of issue time.

Like the scenes, this is a check, never a tuning target. Needs pandas and numpy.

    python3 tools/current_state.py --scene $NEPHOCAST_DATASETS/independent-scenes/camera2-breaking-overcast \\
        --out WORK/camera2/out-cloudy
"""
import argparse

import numpy as np
import pandas as pd


def rmse(e):
    return float(np.sqrt(np.mean(np.square(e)))) if len(e) else float("nan")


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scene", required=True, help="the scene folder (with truth/)")
    ap.add_argument("--out", required=True, help="the replay's output folder")
    a = ap.parse_args()
    truth = pd.read_csv(f"{a.scene}/truth/truth.csv")
    truth["time"] = pd.to_datetime(truth["time"], utc=True)
    series = pd.read_csv(f"{a.scene}/truth/truth_series.csv")
    series["time"] = pd.to_datetime(series["time"], utc=True)
    ghi_truth = series.set_index("time")["ghi_plant_mean_wm2"]
    fc = pd.read_csv(f"{a.out}/forecasts.csv")
    for c in ("issue_time_utc", "target_time_utc"):
        fc[c] = pd.to_datetime(fc[c], utc=True)
    fc = fc[fc["block"] == "plant"]
    frames = pd.read_csv(f"{a.out}/frames.csv")
    frames["time_utc"] = pd.to_datetime(frames["time_utc"], utc=True)

    now = fc[fc["horizon_s"] == 0].merge(truth, left_on="issue_time_utc", right_on="time", suffixes=("", "_truth"))
    now = now.merge(frames, left_on="issue_time_utc", right_on="time_utc", how="left", suffixes=("", "_frame"))
    cz = np.cos(np.radians(now["sun_zenith_deg"]))
    now["e_ghi"] = now["ghi_wm2"] - now["ghi_plant_mean_wm2"]
    now["e_beam"] = (now["dni_wm2"] - now["dni_plant_mean_wm2"]) * cz
    now["e_diffuse"] = now["dhi_wm2"] - now["dhi_plant_wm2"]
    print(f"horizon 0: GHI RMSE {rmse(now.e_ghi):.1f} MBE {now.e_ghi.mean():+.1f} | beam (horizontal) RMSE "
          f"{rmse(now.e_beam):.1f} MBE {now.e_beam.mean():+.1f} | diffuse RMSE {rmse(now.e_diffuse):.1f} MBE {now.e_diffuse.mean():+.1f} W/m2")
    t0 = now["issue_time_utc"].min()
    now["block_min"] = ((now["issue_time_utc"] - t0).dt.total_seconds() // 300 * 5).astype(int)
    cols = [c for c in ("beam_thin", "beam_thick", "beam_cloud_brightness", "diffuse_per_cover", "tuning_rows") if c in now]
    rows = []
    for b, g in now.groupby("block_min"):
        r = dict(issue_min=b, n=len(g), ghi_rmse=rmse(g.e_ghi), ghi_mbe=g.e_ghi.mean(), beam_mbe=g.e_beam.mean(),
                 diffuse_mbe=g.e_diffuse.mean(), truth_ghi=g.ghi_plant_mean_wm2.mean(), shaded=g.plant_shaded_frac.mean())
        r.update({c: g[c].mean() for c in cols})
        rows.append(r)
    pd.set_option("display.width", 250)
    print(pd.DataFrame(rows).round(2).to_string(index=False))
    now["truth_share"] = now["dni_plant_mean_wm2"] / now["dni_clear_wm2"]
    now["nowcast_share"] = now["dni_wm2"] / now["dni_clear_wm2"]
    print("beam share of clear-sky DNI, binned by the truth's:")
    for lo, hi in ((0.0, 0.05), (0.05, 0.5), (0.5, 0.95), (0.95, 2.0)):
        g = now[(now.truth_share >= lo) & (now.truth_share < hi)]
        print(f"  truth in [{lo:.2f}, {hi:.2f}): n {len(g)}, truth {g.truth_share.mean():.2f}, nowcast {g.nowcast_share.mean():.2f}")

    nowcast = fc[fc["horizon_s"] == 0].set_index("issue_time_utc")["ghi_wm2"]
    for h in (300, 600, 900):
        g = fc[fc["horizon_s"] == h].copy()
        g["truth"] = ghi_truth.reindex(pd.DatetimeIndex(g["target_time_utc"])).to_numpy()
        g["nowcast_then"] = nowcast.reindex(pd.DatetimeIndex(g["target_time_utc"])).to_numpy()
        g = g.dropna(subset=["truth", "nowcast_then"])
        g["block"] = ((g["issue_time_utc"] - t0).dt.total_seconds() // 600 * 10).astype(int)
        blocks = {int(b): round(rmse(x.ghi_wm2 - x.truth)) for b, x in g.groupby("block")}
        print(f"{h // 60:>2} min: RMSE {rmse(g.ghi_wm2 - g.truth):.0f}, nowcast at the target {rmse(g.nowcast_then - g.truth):.0f}, "
              f"forecast vs that nowcast {rmse(g.ghi_wm2 - g.nowcast_then):.0f} W/m2; RMSE by 10-min issue block {blocks}")


if __name__ == "__main__":
    main()
