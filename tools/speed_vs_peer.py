#!/usr/bin/env python3
"""Speed of nephocast against the Python/OpenCV peer, as ratios from runs made back to back.

Runs the peer's `bench.py --quick` and `nephocast bench --size 1024 --threads 1 --json` in turn,
ROUNDS times (A B A B ...), and prints each round's ratios and their medians. Absolute times on a
shared machine drift by up to 2x; a ratio from one round compares the two under the same load.

    python3 tools/speed_vs_peer.py --peer ../shared/peer-bench/bench.py --python ../.peer-venv/bin/python \
        --bin target/release/nephocast --rounds 3

Peer compute = segment + rectify + block matching + forecast (its stage medians at one OpenCV
thread); peer end to end = its `fps_e2e_step` (decode plus a full step). Ours: the engine step
without and with the ensemble, and frames per second of decode plus the whole step one after the
other on one thread: `ratio_fps_e2e` from the mean over the whole run (set-up at the first frame
included), `ratio_fps_e2e_median` from the median frame, as the peer's `fps_e2e_step` is 1000 over
the median of repeated steps (like for like). On two threads: ours with the frames decoded ahead as jobs on the engine's pool of two threads,
overlapping the step (as replay runs), against the peer's `fps_e2e_step` with
OpenCV at two threads.

With `--baseline BIN` each round also runs a second nephocast binary (e.g. the build before a
change) right after the first, and prints its ratios too: a before/after comparison made under the
same load, against the same peer run.
"""
import argparse
import json
import statistics
import subprocess


def last_json(out: str) -> dict:
    for line in reversed(out.strip().splitlines()):
        line = line.strip()
        if line.startswith("{"):
            return json.loads(line)
    raise SystemExit("no JSON line in the output")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--peer", required=True, help="the peer's bench.py")
    ap.add_argument("--python", default="python3", help="the Python with the peer's packages")
    ap.add_argument("--bin", default="target/release/nephocast")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--frames", type=int, default=40, help="frames of nephocast bench")
    ap.add_argument("--decode-reduction", type=int, default=0, help="nephocast bench --decode-reduction (0: automatic)")
    ap.add_argument("--map-cells", type=int, default=0,
                    help="nephocast bench --map-cells for --bin (0: the scene's 256; the baseline keeps 256): fewer cells change the forecasts")
    ap.add_argument("--baseline", help="a second nephocast binary, run after --bin in every round against the same peer run")
    a = ap.parse_args()
    rows = []
    base_rows = []
    for k in range(a.rounds):
        peer = last_json(subprocess.run([a.python, a.peer, "--quick"], capture_output=True, text=True, check=True).stdout)
        p = peer["sizes"]["1024"]["threads"]["1"]
        p2 = peer["sizes"]["1024"]["threads"].get("2", p)
        rows.append(ratios(a, a.bin, p, p2, a.map_cells))
        print(f"round {k + 1}: " + ", ".join(f"{key} {v:.2f}" for key, v in rows[-1].items()), flush=True)
        if a.baseline:
            base_rows.append(ratios(a, a.baseline, p, p2))
            print(f"round {k + 1} baseline: " + ", ".join(f"{key} {v:.2f}" for key, v in base_rows[-1].items()), flush=True)
    med = {key: statistics.median(r[key] for r in rows) for key in rows[0]}
    print("median: " + ", ".join(f"{key} {v:.2f}" for key, v in med.items()))
    out = {"rounds": rows, "median": med}
    if base_rows:
        base_med = {key: statistics.median(r[key] for r in base_rows) for key in base_rows[0]}
        print("baseline median: " + ", ".join(f"{key} {v:.2f}" for key, v in base_med.items()))
        out["baseline_rounds"] = base_rows
        out["baseline_median"] = base_med
    print(json.dumps(out))


def ratios(a, binary: str, p: dict, p2: dict, map_cells: int = 0) -> dict:
    """One nephocast bench run of `binary` and its ratios against the peer's figures `p` (one
    OpenCV thread) and `p2` (two); `map_cells` > 0 passes `--map-cells`."""
    cells = ["--map-cells", str(map_cells)] if map_cells else []
    ours = last_json(subprocess.run([binary, "bench", "--size", "1024", "--threads", "1", "--frames", str(a.frames),
                                     "--decode-reduction", str(a.decode_reduction), "--json"] + cells,
                                    capture_output=True, text=True, check=True).stdout)
    peer_compute = p["segment"] + p["rectify"] + p["motion_block"] + p["forecast"]
    r = {
        "peer_compute_ms": peer_compute,
        "peer_decode_ms": p["decode"],
        "peer_fps_e2e": p["fps_e2e_step"],
        "step_ms": ours["step_ms_median"],
        "step_with_ensemble_ms": ours["step_with_ensemble_ms_median"],
        "decode_ms": ours["decode_ms"],
        "decode_whole_ms": ours["decode_whole_ms"],
        "fps_e2e": ours["throughput_fps"],
        # 1000 over the median frame's decode + step (builds before it lack it: NaN).
        "fps_e2e_median": ours.get("throughput_fps_median", float("nan")),
        "peer_fps_e2e_2threads": p2["fps_e2e_step"],
        "fps_e2e_overlapped_2threads": ours["throughput_fps_overlapped"],
    }
    r["ratio_step"] = peer_compute / r["step_ms"]
    r["ratio_step_with_ensemble"] = peer_compute / r["step_with_ensemble_ms"]
    r["ratio_decode"] = p["decode"] / r["decode_ms"]
    r["ratio_fps_e2e"] = r["fps_e2e"] / r["peer_fps_e2e"]
    r["ratio_fps_e2e_median"] = r["fps_e2e_median"] / r["peer_fps_e2e"]
    r["ratio_fps_e2e_2threads"] = r["fps_e2e_overlapped_2threads"] / r["peer_fps_e2e_2threads"]
    return r


if __name__ == "__main__":
    main()
