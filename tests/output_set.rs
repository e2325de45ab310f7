//! Replay outputs as a set: quoted CSV fields that read back whole, a lock against a second run,
//! cleanup of what killed runs leave, and kill -9 at random points leaving the old complete set or
//! the new one, never a mix.
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

use nephocast::output_set::{MANIFEST, PAUSE_ENV, check_manifest, leftovers, lock};
use nephocast::verify::read_rows;

const BIN: &str = env!("CARGO_BIN_EXE_nephocast");

/// A small synthetic sequence (16 frames of 128 px; a replay takes a fraction of a second),
/// rendered once per test process.
fn scene() -> &'static Path {
    static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();
    DIR.get_or_init(|| {
        let d = tempfile::tempdir().unwrap();
        let st = Command::new(BIN)
            .args(["synth", "--scene", "larkspur-demo", "--seed", "3", "--size", "128", "--minutes", "8", "--step-s", "30", "--quiet", "--out"])
            .arg(d.path().join("seq"))
            .stdout(Stdio::null())
            .status()
            .unwrap();
        assert!(st.success());
        d
    })
    .path()
}

fn replay_cmd(seq: &Path, frames: &Path, out: &Path, overlays: bool) -> Command {
    let mut c = Command::new(BIN);
    c.arg("replay").arg("--site").arg(seq.join("site.toml")).arg("--frames").arg(frames).arg("--out").arg(out).arg("--quiet");
    if overlays {
        c.args(["--overlays", "2"]);
    }
    c.stdout(Stdio::null()).stderr(Stdio::piped());
    c
}

/// Every file under `dir` (relative, `/`-separated) with its bytes.
fn files(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    fn walk(base: &Path, d: &Path, out: &mut BTreeMap<String, Vec<u8>>) {
        for e in std::fs::read_dir(d).unwrap().flatten() {
            let p = e.path();
            if p.is_dir() {
                walk(base, &p, out);
            } else {
                let rel = p.strip_prefix(base).unwrap().to_string_lossy().replace('\\', "/");
                out.insert(rel, std::fs::read(&p).unwrap());
            }
        }
    }
    let mut m = BTreeMap::new();
    walk(dir, dir, &mut m);
    m
}

/// `frames.csv` without its timing columns (decode and stage times differ from run to run).
fn frames_without_timings(bytes: &[u8]) -> Vec<Vec<String>> {
    let mut r = csv::Reader::from_reader(bytes);
    let h = r.headers().unwrap().clone();
    let keep: Vec<usize> = h.iter().enumerate().filter(|(_, n)| !n.ends_with("_ms")).map(|(i, _)| i).collect();
    r.records().map(|rec| keep.iter().map(|&i| rec.as_ref().unwrap()[i].to_string()).collect()).collect()
}

/// Whether `dir` holds exactly the set of `reference`: the same files, each with the same content
/// (frames.csv without its timings, the manifest by its file list), and consistent with its own
/// manifest.
fn same_set(dir: &Path, reference: &BTreeMap<String, Vec<u8>>) -> Result<(), String> {
    if !dir.is_dir() {
        return Err("no output folder".into());
    }
    let got = files(dir);
    let (a, b): (Vec<_>, Vec<_>) = (got.keys().collect(), reference.keys().collect());
    if a != b {
        return Err(format!("file lists differ: {} files vs {} in the reference", a.len(), b.len()));
    }
    for (k, v) in &got {
        let same = match k.as_str() {
            "frames.csv" => frames_without_timings(v) == frames_without_timings(&reference[k]),
            MANIFEST => {
                let paths = |b: &[u8]| -> Vec<String> {
                    let m: serde_json::Value = serde_json::from_slice(b).unwrap();
                    m["files"].as_array().unwrap().iter().map(|f| f["path"].as_str().unwrap().to_string()).collect()
                };
                paths(v) == paths(&reference[k])
            }
            _ => *v == reference[k],
        };
        if !same {
            return Err(format!("{k} differs from the reference"));
        }
    }
    check_manifest(dir).map_err(|e| e.to_string())
}

#[test]
fn nasty_names_and_reasons_round_trip_through_frames_csv_report_and_evaluate() {
    let seq = scene();
    let d = tempfile::tempdir().unwrap();
    // A copy of the sequence whose frames folder holds extra frames with awkward names: a good
    // frame under a name with a comma and quotes (a duplicated time), and an unreadable one whose
    // name has a comma and a line break.
    let frames = d.path().join("frames");
    std::fs::create_dir(&frames).unwrap();
    let mut names: Vec<String> = std::fs::read_dir(seq.join("seq/frames")).unwrap().flatten().map(|e| e.file_name().to_string_lossy().into_owned()).collect();
    names.sort();
    for n in &names {
        std::fs::copy(seq.join("seq/frames").join(n), frames.join(n)).unwrap();
    }
    let comma = names[3].replace(".jpg", ",cam \"b\".jpg");
    std::fs::copy(seq.join("seq/frames").join(&names[3]), frames.join(&comma)).unwrap();
    let broken = "frame_20260614T083215Z,cut\nshort.jpg".to_string();
    std::fs::write(frames.join(&broken), b"\xff\xd8\xff\xe0 not, a \"jpeg\"\n").unwrap();
    let out = d.path().join("out");
    let o = replay_cmd(&seq.join("seq"), &frames, &out, false).arg("--report").output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let rows = read_rows(&out.join("frames.csv")).unwrap();
    assert_eq!(rows.len(), names.len() + 2);
    let row = |n: &str| rows.iter().find(|r| r["file"] == n).unwrap_or_else(|| panic!("{n:?} not in frames.csv"));
    assert_eq!(row(&comma)["time_utc"], row(&names[3])["time_utc"]);
    // A JPEG start without the rest: the intake calls it truncated.
    assert_eq!(row(&broken)["status"], "truncated");
    assert!(!row(&broken)["reason"].is_empty());
    assert!(out.join("report.html").is_file());
    check_manifest(&out).unwrap();
    let e = Command::new(BIN).args(["evaluate", "--sequence"]).arg(seq.join("seq")).arg("--replay").arg(&out).output().unwrap();
    assert!(e.status.success(), "{}", String::from_utf8_lossy(&e.stderr));
    // evaluate adds its file to the set and keeps the manifest true.
    check_manifest(&out).unwrap();
    assert!(std::fs::read_to_string(out.join(MANIFEST)).unwrap().contains("evaluation.json"));
}

#[test]
fn a_second_run_into_a_busy_folder_is_refused_with_the_folder_named() {
    let seq = scene();
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("busy");
    let held = lock(&out).unwrap();
    let o = replay_cmd(&seq.join("seq"), &seq.join("seq/frames"), &out, false).output().unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains(&out.display().to_string()) && err.contains("in use"), "{err}");
    assert!(!out.exists() && leftovers(&out).is_empty());
    drop(held);
    let o = replay_cmd(&seq.join("seq"), &seq.join("seq/frames"), &out, false).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

#[test]
fn leftovers_of_killed_runs_are_removed_by_the_next_run() {
    let seq = scene();
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("out");
    let o = replay_cmd(&seq.join("seq"), &seq.join("seq/frames"), &out, false).output().unwrap();
    assert!(o.status.success());
    // What a killed run of this or an older version leaves: a staging folder, an old set put
    // aside while the output folder exists, temporary files beside and inside the folder. The
    // process id is beyond Linux's largest (2^22), so no such process runs.
    let dead = 9_999_999;
    std::fs::create_dir_all(d.path().join(format!(".out.staging{dead}/overlays"))).unwrap();
    std::fs::write(d.path().join(format!(".out.staging{dead}/forecasts.csv")), b"half").unwrap();
    std::fs::create_dir(d.path().join(format!(".out.old{dead}"))).unwrap();
    std::fs::write(d.path().join(format!(".out.tmp{dead}")), b"half").unwrap();
    std::fs::write(out.join(format!(".forecasts.csv.tmp{dead}")), b"half").unwrap();
    assert_eq!(leftovers(&out).len(), 3);
    let o = replay_cmd(&seq.join("seq"), &seq.join("seq/frames"), &out, false).output().unwrap();
    assert!(o.status.success());
    assert_eq!(leftovers(&out), Vec::<String>::new());
    assert!(!files(&out).keys().any(|k| k.contains(".tmp")));
}

/// SplitMix64, a small seeded generator (common practice, no source).
struct Rng(u64);
impl Rng {
    fn next_f64(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
}

#[test]
fn kill_9_at_random_points_leaves_the_old_complete_set_or_the_new_one() {
    const TRIALS: usize = 50;
    // The test hook: a pause before each file written and before the swap, so that kills land in
    // the write phase too.
    const PAUSE_MS: &str = "15";
    let seq = scene();
    let d = tempfile::tempdir().unwrap();
    let (site_seq, frames) = (seq.join("seq"), seq.join("seq/frames"));
    // Reference sets of the two variants (without and with overlays), and how long a run of each
    // takes (the shortest of three, so that kills spread over the whole run and a few land after it).
    let mut refs = vec![];
    let mut run_s = vec![];
    for overlays in [false, true] {
        let r = d.path().join(format!("ref-{overlays}"));
        let mut best = f64::INFINITY;
        for _ in 0..3 {
            let t = Instant::now();
            let o = replay_cmd(&site_seq, &frames, &r, overlays).env(PAUSE_ENV, PAUSE_MS).output().unwrap();
            best = best.min(t.elapsed().as_secs_f64());
            assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        }
        run_s.push(best);
        refs.push(files(&r));
    }
    assert_ne!(refs[0].keys().collect::<Vec<_>>(), refs[1].keys().collect::<Vec<_>>());
    let out: PathBuf = d.path().join("out");
    // The old complete set.
    assert!(replay_cmd(&site_seq, &frames, &out, false).output().unwrap().status.success());
    let mut current = 0usize;
    let mut rng = Rng(0x5eed_0014);
    let mut phases: BTreeMap<&str, usize> = BTreeMap::new();
    let mut outcomes = [0usize; 2];
    let mut killed: Vec<String> = vec![];
    for trial in 0..TRIALS {
        let next = 1 - current;
        let delay = rng.next_f64() * run_s[next] * 1.05;
        let mut child = replay_cmd(&site_seq, &frames, &out, next == 1).env(PAUSE_ENV, PAUSE_MS).stderr(Stdio::null()).spawn().unwrap();
        let pid = child.id();
        std::thread::sleep(Duration::from_secs_f64(delay));
        let finished = child.try_wait().unwrap().is_some();
        if !finished {
            child.kill().unwrap(); // SIGKILL
        }
        child.wait().unwrap();
        // Where the kill landed, from what the run left behind.
        let staging = d.path().join(format!(".out.staging{pid}"));
        let phase = if finished {
            "after the run ended"
        } else if staging.is_dir() && same_set(&out, &refs[next]).is_ok() {
            "after the swap, before the old set was removed"
        } else if staging.join(MANIFEST).exists() || staging.join("forecasts.csv").exists() {
            "write phase (final files, manifest, swap)"
        } else if staging.is_dir() {
            "frame loop (staging started)"
        } else if same_set(&out, &refs[next]).is_ok() {
            "after the swap"
        } else {
            "start-up (before staging)"
        };
        *phases.entry(phase).or_default() += 1;
        // Only leftovers of killed runs may remain (a run killed before its start-up cleanup
        // leaves those of earlier ones); the next run that gets going removes them.
        killed.push(pid.to_string());
        for l in leftovers(&out) {
            assert!(killed.iter().any(|k| l.ends_with(k.as_str())), "trial {trial}: leftover {l} of no killed run");
        }
        if same_set(&out, &refs[next]).is_ok() {
            current = next;
        } else if let Err(e) = same_set(&out, &refs[current]) {
            panic!("trial {trial} (killed after {delay:.3} s, {phase}): the folder is neither the old set nor the new one: {e}");
        }
        outcomes[current] += 1;
    }
    // A following successful run cleans up.
    let o = replay_cmd(&site_seq, &frames, &out, false).output().unwrap();
    assert!(o.status.success());
    same_set(&out, &refs[0]).unwrap();
    assert_eq!(leftovers(&out), Vec::<String>::new());
    println!("{TRIALS} kill -9 trials: kills by phase {phases:?}; folder afterwards: {} without overlays, {} with", outcomes[0], outcomes[1]);
}
