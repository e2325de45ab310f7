"""The markdown report of tools/independent_scenes.py: the summary table and each camera's
section, from the results it collected."""
from scene_camera import BAND_NAMES, BANDS, fnum  # noqa: F401


# ------------------------------------------------------------------ report
def summary_table(results):
    """One row per camera and cloudy scene, with the issue's targets in the header: calibration p95
    at zenith < 80° (0.2°), motion (0.5 m/s), pooled 5–15 min skill (0.8 × the yardstick), 1-min
    RMSE (below smart persistence's), largest |MBE| (50 W/m²), clear-day RMSE (20 W/m²)."""
    L = ["## Summary\n",
         "| camera | cloudy scene | calibration p95 (≤ 0.2°) | motion error (≤ 0.5 m/s) | pooled 5–15 skill (≥ 0.8 × yardstick) "
         "| 1-min RMSE (< persistence) | largest \\|MBE\\| (≤ 50) | clear-day RMSE (≤ 20) |",
         "|---|---|---|---|---|---|---|---|"]
    for r in results:
        ci = r.get("calibration", {})
        err = ci.get("error") or {}
        cal = fnum(err.get("deg_p95_z_lt_80"), "{:.3f}") + "°" if err else ("refused" if ci.get("exit_code") not in (None, 0) else "—")
        rc = r.get("replay_cloudy", {})
        ms, fs = rc.get("motion_summary") or {}, rc.get("forecast_summary") or {}
        cs = (r.get("replay_clear", {}).get("forecast_summary") or {})
        motion = f"{ms['mean_vector_error_ms']:.2f} m/s" if ms.get("mean_vector_error_ms") is not None else "—"
        skill = (f"{fnum(fs.get('skill_pooled_5_15'))} (target {fnum(fs.get('yardstick_pooled_0_8'))})" if fs else "—")
        rmse1 = f"{fnum(fs.get('rmse_1'), '{:.1f}')} ({fnum(fs.get('rmse_sp_1'), '{:.1f}')})" if fs else "—"
        mbe = fnum(fs.get("max_abs_mbe"), "{:.1f}") if fs else "—"
        clear = fnum(cs.get("rmse_pooled_5_15"), "{:.1f}") if cs else "—"
        note = f" ({r['error']})" if r.get("error") else ""
        L.append(f"| {r['camera']} | {r.get('cloudy_scene', '—')}{note} | {cal} | {motion} | {skill} | {rmse1} | {mbe} | {clear} |")
    return "\n".join(L) + "\n"


def markdown(res):
    L = []
    cam = res["camera"]
    L.append(f"## {cam} — camera from `{res['camera_from']}` ({res.get('clear_scene')} → {res.get('cloudy_scene')})\n")
    ci = res.get("calibration", {})
    f = ci.get("fields") or {}
    t = ci.get("true", {})
    if ci.get("clear_subset", "all") != "all":
        L.append(f"Calibrated from part of the clear day only: `{ci['clear_subset']}`, {ci.get('clear_frames')} frames.\n")
    if ci.get("cloudy_frames_added"):
        L.append(f"Calibrated from the clear day's {ci.get('clear_frames')} frames and {ci['cloudy_frames_added']} of the cloudy scene's.\n")
    if res.get("static_paint"):
        sp = res["static_paint"]
        L.append(f"Painted into every frame: {len(sp['poles'])} pole(s) "
                 + ", ".join(f"{p['width_px']:g} px wide" for p in sp["poles"])
                 + (f"; a reflection at ({sp['reflection_px'][0]:.0f}, {sp['reflection_px'][1]:.0f}) in {sp['reflection_share']:g} of the frames"
                    if sp.get("reflection_px") else "") + ".\n")
    L.append(f"**Calibration**: exit {ci.get('exit_code')}; model {f.get('model')} (true {t.get('model')}), "
             f"f {fnum(f.get('f_px_per_rad'))} px/rad (true {fnum(t.get('f_px'))}), "
             f"max field angle {fnum(f.get('max_field_angle_deg'), '{:.1f}')}° (true {fnum(t.get('theta_max_deg'), '{:.1f}')}), "
             f"c = ({fnum(f.get('cx_px'), '{:.1f}')}, {fnum(f.get('cy_px'), '{:.1f}')}) "
             f"(true {fnum(t.get('cx'), '{:.1f}')}, {fnum(t.get('cy'), '{:.1f}')}), "
             f"yaw/pitch/roll {fnum(f.get('yaw_deg'))}/{fnum(f.get('pitch_deg'))}/{fnum(f.get('roll_deg'))}° "
             f"(true {fnum(ci.get('true_euler_ours', {}).get('yaw_deg'))}/{fnum(ci.get('true_euler_ours', {}).get('pitch_deg'))}/"
             f"{fnum(ci.get('true_euler_ours', {}).get('roll_deg'))})")
    if ci.get("fit"):
        fit = ci["fit"]
        L.append(f"fit: {fit.get('detections')} detections, residual RMS {fnum(fit.get('rms_px'))} px ({fnum(fit.get('rms_deg'), '{:.3f}')}°)")
    for w in ci.get("warnings", []):
        L.append(f"- calibrate: `{w}`")
    if ci.get("exit_code") not in (0, None):
        L.append(f"- calibrate stderr: `{ci.get('stderr', '').strip()[-500:]}`")
    if "truth_conversion_check" in res:
        v = res["truth_conversion_check"]
        L.append(f"- truth conversion check: max |bin − skycommon| = {v['max_px']:.4f} px over {v['n']} directions ({v['n_missing']} missing)")
    if ci.get("binary_refused"):
        L.append(f"- the binary refuses the calibration file: `{ci['binary_refused']}`")
    if "python_model_max_diff_px" in ci:
        L.append(f"- Python camera model vs binary: max {ci['python_model_max_diff_px']:.4f} px, "
                 f"{ci['python_model_nan_mismatch']} inside/outside disagreements")
    eq = ci.get("equivalent_positive_f")
    if eq:
        L.append(f"- f < 0 is a half turn about the optical axis, not a mirror: the same camera is f = {eq['f_px_per_rad']:.2f}, "
                 f"yaw/pitch/roll = {eq['yaw_deg']:.2f}/{eq['pitch_deg']:.2f}/{eq['roll_deg']:.2f}° (max projection difference {eq['max_diff_vs_written_px']:.4f} px; "
                 f"p95 error zenith < 80° {eq['deg_p95_z_lt_80']:.3f}°). Not used for the replay: a user gets the refusal.")
    err = ci.get("error")
    if err and "bands" in err:
        L.append(f"\nerror against the true camera, via {err.get('via')}:")
        L.append("\n| zenith | n | px median | px p95 | deg median | deg p95 | outside ours (proj/unproj) |")
        L.append("|---|---:|---:|---:|---:|---:|---:|")
        for b in err["bands"]:
            L.append(f"| {b['band']} | {b['n']} | {fnum(b['px_median'])} | {fnum(b['px_p95'])} | {fnum(b['deg_median'], '{:.3f}')} | "
                     f"{fnum(b['deg_p95'], '{:.3f}')} | {b['outside_ours_project']}/{b['outside_ours_unproject']} |")
        L.append(f"\np95 angular error over zenith < 80°: **{fnum(err['deg_p95_z_lt_80'], '{:.3f}')}°** "
                 f"(p95 pixel {fnum(err['px_p95_z_lt_80'])} px)")
        bounds = (ci.get("fit") or {}).get("direction_bound_deg") or []
        cover = []
        for b in err["bands"]:
            lo, hi = BANDS[BAND_NAMES.index(b["band"])]
            stated = max((x[2] for x in bounds if x[0] < hi and x[1] > lo), default=float("nan"))
            cover.append(f"{b['band']}: {fnum(b['deg_p95'], '{:.3f}')} ≤ {fnum(stated, '{:.3f}')} {'yes' if b['deg_p95'] <= stated else 'NO'}")
        if bounds:
            L.append("stated bound vs true p95 by band: " + "; ".join(cover))
    elif err:
        L.append(f"- calibration error not measured: {err.get('failed')}")
    lean = ci.get("detection_lean")
    if lean:
        L.append("\ndetections against the true sun (diagnostic; radial: away from the principal point):")
        L.append("\n| detections | n | zenith | radial mean px | radial median px | radial, % of radius | tangential mean px | tangential sd px |")
        L.append("|---|---:|---|---:|---:|---:|---:|---:|")
        for k, v in lean.items():
            if k == "off_sun":
                continue
            L.append(f"| {k} | {v['n']} | {v['zenith_deg'][0]:.0f}–{v['zenith_deg'][1]:.0f}° | {v['radial_mean_px']:+.2f} | {v['radial_median_px']:+.2f} | "
                     f"{v['radial_share_of_radius_pct']:+.2f} | {v['tangential_mean_px']:+.2f} | {v['tangential_sd_px']:.2f} |")
        o = lean.get("off_sun")
        if o:
            L.append(f"\n{o['n_over_2px']} of {o['n']} detections off the true sun by more than 2 px (largest {o['largest_px']:.1f} px); "
                     f"{o['n_cloud_over_sun']} made with cloud over the sun" + (": " + "; ".join(o["over_2px_at"]) if o["over_2px_at"] else ""))
    if res.get("error"):
        L.append(f"\n**{res['error']}**")
    for key in ("cloudy", "clear"):
        r = res.get(f"replay_{key}")
        if r is None:
            continue
        name = res.get(f"{key}_scene")
        if r["exit_code"] != 0:
            L.append(f"\n**Replay {name}**: exit {r['exit_code']}: `{r['stderr'].strip()[-500:]}`")
            continue
        conv = r.get("converted", {})
        L.append(f"\n**Replay {name}**: exit 0; frames {conv.get('frame_status')}; forecast issues {conv.get('n_forecast_issues')}")
        if "error" in r.get("score", {}):
            L.append(f"- score.py failed: {r['score']['error']}")
            continue
        fs = r.get("forecast_summary")
        if key == "cloudy":
            ms = r.get("motion_summary")
            smo = r.get("score", {}).get("motion", {}).get("layer1", {})
            if ms:
                L.append(f"- motion: mean vector error **{ms['mean_vector_error_ms']:.2f} m/s** (median {ms['median_vector_error_ms']:.2f}); "
                         f"mean speed {ms['mean_speed_ms']:.2f} m/s vs true {ms['true_speed_ms']:.2f}; mean vector "
                         f"({ms['mean_u_ms']:.2f}, {ms['mean_v_ms']:.2f}) vs true ({ms['true_u_ms']:.2f}, {ms['true_v_ms']:.2f}); "
                         f"score.py vector RMSE {fnum(smo.get('vector_rmse_ms'))}, direction error median "
                         f"{fnum(smo.get('direction_err_median_deg'), '{:.1f}')}°; {ms['n']} rows; "
                         f"second layer tracked in {conv.get('frames_with_second_layer')} frames "
                         f"(two layers measured in {conv.get('frames_measuring_two_layers')})")
            else:
                L.append("- motion: no motion rows")
            if fs:
                y = fs.get("yardstick") or {}
                L.append(f"- skill vs smart persistence: 5 min **{fnum(fs['skill_5'])}**, 10 min **{fnum(fs['skill_10'])}**, "
                         f"15 min **{fnum(fs['skill_15'])}**, pooled 5–15 **{fnum(fs['skill_pooled_5_15'])}** "
                         f"(yardstick {fnum(y.get('h5'))}/{fnum(y.get('h10'))}/{fnum(y.get('h15'))}/pooled {fnum(y.get('pooled'))}; "
                         f"0.8×yardstick pooled {fnum(fs.get('yardstick_pooled_0_8'))})")
                L.append(f"- 1-min RMSE {fnum(fs['rmse_1'], '{:.1f}')} W/m² vs smart persistence {fnum(fs['rmse_sp_1'], '{:.1f}')}; "
                         f"RMSE 5/10/15 min {fnum(fs['rmse_5'], '{:.1f}')}/{fnum(fs['rmse_10'], '{:.1f}')}/{fnum(fs['rmse_15'], '{:.1f}')} "
                         f"(pooled 5–15 {fnum(fs['rmse_pooled_5_15'], '{:.1f}')} vs SP {fnum(fs['rmse_sp_pooled_5_15'], '{:.1f}')}); "
                         f"largest |MBE| {fnum(fs['max_abs_mbe'], '{:.1f}')} W/m² at {fs['max_abs_mbe_horizon']:.0f} min "
                         f"(signed {fnum(fs['mbe_at_max'], '{:+.1f}')})")
            rp = r.get("score", {}).get("ramps")
            if rp:
                L.append(f"- ramps ({conv.get('ramp_events_used')} warnings): POD {fnum(rp['pod'])}, FAR {fnum(rp['far'])}, "
                         f"CSI {fnum(rp['csi'])}; truth events in scope {rp['n_truth_events_in_scope']}, "
                         f"warned ≥5 min ahead {fnum(rp['events_warned_lead_ge_5min'])}")
        elif fs:
            L.append(f"- clear-day RMSE 1/5/10/15 min: {fnum(fs['rmse_1'], '{:.1f}')}/{fnum(fs['rmse_5'], '{:.1f}')}/"
                     f"{fnum(fs['rmse_10'], '{:.1f}')}/{fnum(fs['rmse_15'], '{:.1f}')} W/m², pooled 5–15 "
                     f"{fnum(fs['rmse_pooled_5_15'], '{:.1f}')} (smart persistence {fnum(fs['rmse_sp_pooled_5_15'], '{:.1f}')}); "
                     f"largest |MBE| {fnum(fs['max_abs_mbe'], '{:.1f}')} W/m² at {fs['max_abs_mbe_horizon']:.0f} min "
                     f"(signed {fnum(fs['mbe_at_max'], '{:+.1f}')})")
    return "\n".join(L) + "\n"
