//! Batches of days, run as a user (or a cluster) would run the binary: sharded runs plus `merge`
//! against one run, resume after a kill, the Slurm array script with its variables set by hand,
//! and the Kubernetes Indexed Job manifest.
//!
//! The days are tiny synthetic sequences (128 px, 4 minutes of frames, one seed each; broken
//! cumulus, clear and breaking overcast in turn), made once per test binary.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::OnceLock;

use nephocast::synth::{Scene, scene, write_sequence};

const DAYS: usize = 10;

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_nephocast"))
}

struct Fixture {
    _dir: tempfile::TempDir,
    root: PathBuf,
}

impl Fixture {
    fn days(&self) -> PathBuf {
        self.root.join("days")
    }
    fn site(&self) -> PathBuf {
        self.days().join("day00").join("site.toml")
    }
}

/// The scene of day `i`: fast broken cumulus, a clear sky, breaking overcast in turn.
fn day_scene(i: usize) -> &'static str {
    ["broken-cumulus-fast", "clear-day", "overcast-breaking"][i % 3]
}

/// Ten days, 4 minutes at a frame every 20 s from 08:30 UTC, 128 px, seeds 1 … 10, their scenes by
/// [`day_scene`].
fn fixture() -> &'static Fixture {
    static F: OnceLock<Fixture> = OnceLock::new();
    F.get_or_init(|| {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path().to_path_buf();
        for i in 0..DAYS {
            let mut spec = scene(day_scene(i)).unwrap();
            spec.size_px = 128;
            spec.duration_min = 4.0;
            spec.frame_step_s = 20.0;
            spec.start_utc = "2026-06-14T08:30:00Z".into();
            spec.truth_mask_every = 3;
            let mut s = Scene::new(spec, i as u64 + 1).unwrap();
            s.site.map.cells = 64;
            write_sequence(&s, &root.join("days").join(format!("day{i:02}")), false).unwrap();
        }
        Fixture { _dir: dir, root }
    })
}

fn ok(o: &Output, what: &str) -> String {
    assert!(o.status.success(), "{what}: {}\n{}", String::from_utf8_lossy(&o.stderr), String::from_utf8_lossy(&o.stdout));
    String::from_utf8_lossy(&o.stdout).into_owned()
}

fn batch(f: &Fixture, out: &Path, extra: &[&str]) -> Output {
    let mut c = bin();
    c.args(["replay", "--batch", "--quiet", "--site"]).arg(f.site()).arg("--frames").arg(f.days()).arg("--out").arg(out).args(extra);
    c.output().unwrap()
}

/// One batch run over all days (made once, shared by the tests).
fn single_run() -> &'static Path {
    static OUT: OnceLock<PathBuf> = OnceLock::new();
    OUT.get_or_init(|| {
        let f = fixture();
        let out = f.root.join("single");
        let text = ok(&batch(f, &out, &[]), "single batch");
        assert!(text.contains(&format!("{DAYS} replayed")), "{text}");
        out
    })
}

fn read(p: &Path) -> String {
    std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

fn json(p: &Path) -> serde_json::Value {
    serde_json::from_str(&read(p)).unwrap()
}

/// The plant's RMSE at 5 minutes in a `scores.csv`, as its exact bits.
fn plant_rmse_5min(scores: &Path) -> (u64, u64) {
    let mut rdr = csv::Reader::from_path(scores).unwrap();
    for r in rdr.records() {
        let r = r.unwrap();
        if &r[0] == "plant" && &r[1] == "300" {
            return (r[2].parse().unwrap(), r[3].parse::<f64>().unwrap().to_bits());
        }
    }
    panic!("{}: no plant row at 300 s", scores.display());
}

/// Three shard processes plus `merge` give the single run's sums and scores byte for byte.
#[test]
fn shards_and_merge_equal_one_run() {
    let f = fixture();
    let single = single_run();
    let shards: Vec<PathBuf> = (0..3).map(|k| f.root.join(format!("shard-{k}"))).collect();
    for (k, s) in shards.iter().enumerate() {
        ok(&batch(f, s, &["--shard", &format!("{k}/3")]), "shard");
        let meta = json(&s.join("aggregate").join("run.json"));
        assert_eq!(meta["shard"], format!("{k}/3"));
        let days: Vec<String> = meta["days"].as_array().unwrap().iter().map(|d| d.as_str().unwrap().to_string()).collect();
        let expected: Vec<String> = (0..DAYS).filter(|i| i % 3 == k).map(|i| format!("day{i:02}")).collect();
        assert_eq!(days, expected, "shard {k}/3 takes the days with index mod 3 = {k}");
    }
    let merged = f.root.join("merged");
    let mut c = bin();
    let text = ok(&c.arg("merge").arg("--out").arg(&merged).args(&shards).output().unwrap(), "merge");
    assert!(text.contains(&format!("merged {DAYS} days from 3 shard folders")), "{text}");
    for file in ["stats.csv", "scores.csv", "days.csv", "sky_stats.csv", "sky_scores.csv", "report.html"] {
        assert_eq!(read(&single.join("aggregate").join(file)), read(&merged.join(file)), "{file} differs between one run and the merged shards");
    }
    let (n, bits) = plant_rmse_5min(&merged.join("scores.csv"));
    assert_eq!((n, bits), plant_rmse_5min(&single.join("aggregate").join("scores.csv")));
    println!("{DAYS} days, 3 shards: merged plant RMSE at 5 min {} W/m² over {n} pairs, bits {bits:016x} as in one run", f64::from_bits(bits));
    let (a, b) = (json(&single.join("aggregate").join("run.json")), json(&merged.join("run.json")));
    assert_eq!(a["config_sha256"], b["config_sha256"]);
    assert_eq!((a["first_frame_utc"].clone(), a["last_frame_utc"].clone()), (b["first_frame_utc"].clone(), b["last_frame_utc"].clone()));
    assert_eq!(b["kind"], "merge");
    assert_eq!(b["days"].as_array().unwrap().len(), DAYS);
    refusals(&shards, &f.root);
}

/// The `<svg>…</svg>` elements of a page, each checked to be well-formed XML as far as its tags go
/// (every element closed in order, attribute values quoted).
fn svg_elements(html: &str) -> Vec<&str> {
    let mut out = vec![];
    let mut rest = html;
    while let Some(a) = rest.find("<svg ") {
        let b = a + rest[a..].find("</svg>").expect("an svg element is closed") + "</svg>".len();
        let svg = &rest[a..b];
        let mut stack: Vec<&str> = vec![];
        let mut t = svg;
        while let Some(i) = t.find('<') {
            let j = i + t[i..].find('>').expect("a tag is closed");
            let tag = &t[i + 1..j];
            if let Some(name) = tag.strip_prefix('/') {
                assert_eq!(stack.pop(), Some(name), "</{name}> closes another element in {svg}");
            } else {
                let name = tag.split_whitespace().next().unwrap();
                assert_eq!(tag.matches('\'').count() % 2, 0, "unbalanced quotes in <{tag}>");
                if !tag.ends_with('/') {
                    stack.push(name);
                }
            }
            t = &t[j + 1..];
        }
        assert!(stack.is_empty(), "unclosed {stack:?} in {svg}");
        out.push(svg);
        rest = &rest[b..];
    }
    out
}

/// The aggregate's `report.html`: self-contained, its charts (well-formed inline SVG with the
/// titles, axis labels and legends expected), horizon-0 skill as n/a, one row per day, and the
/// figures of `scores.csv`.
#[test]
fn aggregate_report_has_its_charts() {
    let single = single_run();
    let html = read(&single.join("aggregate").join("report.html"));
    for outside in ["<script", "<link", "src='http", "src=\"http", "href="] {
        assert!(!html.contains(outside), "the report is not self-contained: {outside}");
    }
    assert!(!html.contains("NaN") && !html.contains("inf<"), "a figure is not a number");
    let svgs = svg_elements(&html);
    let expected = [
        ("RMSE by horizon", "horizon [min]", &["forecast", "smart persistence"][..]),
        ("Skill against smart persistence by horizon", "horizon [min]", &["forecast", "persistence (0)"][..]),
        ("CRPS of the ensemble by horizon", "horizon [min]", &["CRPS"][..]),
        ("P10–P90 coverage by horizon", "horizon [min]", &["coverage", "nominal 80 %"][..]),
        ("Skill per day (plant)", "day (number in the table below)", &["5 min", "10 min", "15 min"][..]),
        ("RMSE per day (plant)", "day (number in the table below)", &["5 min", "10 min", "15 min"][..]),
    ];
    assert_eq!(svgs.len(), expected.len(), "charts: {}", svgs.iter().map(|s| &s[..s.len().min(200)]).collect::<Vec<_>>().join("\n"));
    for (svg, (title, x_label, legend)) in svgs.iter().zip(expected) {
        for lab in [title, x_label].iter().chain(legend) {
            assert!(svg.contains(&format!(">{lab}</text>")), "{title}: no label {lab:?}");
        }
        assert!(svg.contains("<path d='M"), "{title}: no line");
        assert!(!svg.contains(">no data<"), "{title}: no data");
    }
    // Horizon axes run 0 … 20 min; the per-day axis counts the days.
    assert!(svgs[0].contains(">0</text>") && svgs[0].contains(">20</text>"));
    assert!(svgs[4].contains(&format!(">{DAYS}</text>")));
    // The table: horizon 0 has no skill, and the figures are those of scores.csv.
    let rows: Vec<csv::StringRecord> = csv::Reader::from_path(single.join("aggregate").join("scores.csv")).unwrap().records().map(Result::unwrap).collect();
    for r in rows.iter().filter(|r| &r[0] == "plant" && ["0", "300", "600", "900"].contains(&&r[1])) {
        let h: u32 = r[1].parse().unwrap();
        let row = &html[html.find(&format!("<tr><td>{} min</td>", h / 60)).unwrap()..];
        let cells: Vec<&str> = row[..row.find("</tr>").unwrap()].split("<td>").skip(1).map(|c| c.trim_end_matches("</td>")).collect();
        assert_eq!(cells[1], &r[2], "{h} s: pairs");
        assert_eq!(cells[2], format!("{:.1}", r[3].parse::<f64>().unwrap()), "{h} s: RMSE");
        let skill = if r[10].is_empty() { "n/a".to_string() } else { format!("{:.3}", r[10].parse::<f64>().unwrap()) };
        assert_eq!(cells[6], skill, "{h} s: skill");
        if h == 0 {
            assert_eq!(cells[6], "n/a", "horizon-0 skill");
        }
    }
    for i in 0..DAYS {
        assert!(html.contains(&format!("<tr><td>{}</td><td style='text-align:left'>day{i:02}</td>", i + 1)), "day{i:02} has no row");
    }
    println!("aggregate report: {} bytes, {} charts", html.len(), svgs.len());
}

/// `merge` refuses shards of other configurations or sharing a day, naming both folders.
fn refusals(shards: &[PathBuf], root: &Path) {
    let merge = |dirs: &[&Path]| {
        let mut c = bin();
        c.arg("merge").arg("--out").arg(root.join("refused")).args(dirs).output().unwrap()
    };
    let o = merge(&[&shards[0], &shards[0]]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains("day00 is in both") && e.contains("shard-0"), "{e}");
    // A copy of shard 1 whose configuration digest differs.
    let other = root.join("shard-1-other");
    copy_dir(&shards[1], &other);
    let meta = other.join("aggregate").join("run.json");
    let text = read(&meta);
    let digest = json(&meta)["config_sha256"].as_str().unwrap().to_string();
    std::fs::write(&meta, text.replace(&digest, &"0".repeat(64))).unwrap();
    let o = merge(&[&shards[0], &other]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains("site configurations differ") && e.contains("shard-0") && e.contains("shard-1-other"), "{e}");
    let o = merge(&[&root.join("days")]);
    assert!(String::from_utf8_lossy(&o.stderr).contains("not a batch output folder"));
    assert!(!root.join("refused").exists(), "nothing is written when a merge is refused");
}

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let p = e.unwrap().path();
        let t = to.join(p.file_name().unwrap());
        if p.is_dir() { copy_dir(&p, &t) } else { std::fs::copy(&p, &t).map(|_| ()).unwrap() }
    }
}

/// Bad `--shard` values are refused with exit status 2 and a message saying what K/N must be.
#[test]
fn bad_shards_are_refused() {
    let f = fixture();
    for (spec, says) in [("3/3", "K must be below N"), ("0/0", "N: expected 1"), ("a/2", "K: expected a whole number"), ("2", "expected K/N")] {
        let o = batch(f, &f.root.join("never"), &["--shard", spec]);
        let e = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{spec}: {e}");
        assert!(e.contains(says), "{spec}: {e}");
    }
    let o = bin().args(["replay", "--shard", "0/2", "--site", "s", "--frames", "f", "--out", "o"]).output().unwrap();
    assert!(!o.status.success() && String::from_utf8_lossy(&o.stderr).contains("--batch"));
}

/// A batch of ten days (listed in a file, out of order, with comments) shows its progress, is
/// killed inside its second day, and resumes: the finished day is skipped, the interrupted one
/// redone, and every day's sums and the aggregate equal those of an uninterrupted run. Built with
/// `--features parquet`, each day also has `forecasts.parquet`, which pandas reads with the values
/// of `forecasts.csv` (`tools/check_parquet_pandas.py`; skipped, saying so, without python3 and
/// pyarrow).
#[test]
fn ten_days_show_progress_and_resume_after_a_kill() {
    let f = fixture();
    let list = f.root.join("ten-days.txt");
    let mut text = String::from("# ten days, in no order\n");
    for i in [3, 0, 9, 1, 7, 2, 8, 4, 6, 5] {
        text += &format!("days/day{i:02}{}\n", if i == 7 { "  # a comment" } else { "" });
        if i == 9 {
            text += "\n";
        }
    }
    std::fs::write(&list, text).unwrap();
    let out = f.root.join("resumed");
    let batch_cmd = || {
        let mut c = bin();
        c.args(["replay", "--batch", "--site"]).arg(f.site()).arg("--frames").arg(&list).arg("--out").arg(&out);
        c
    };
    let mut child = batch_cmd().env(nephocast::output_set::PAUSE_ENV, "150").stdout(std::process::Stdio::null()).stderr(std::process::Stdio::piped()).spawn().unwrap();
    let days = out.join("days");
    // Kill once day00 is complete and day01's staging folder exists.
    loop {
        let staging = std::fs::read_dir(&days).ok().is_some_and(|d| d.flatten().any(|e| e.file_name().to_string_lossy().starts_with(".day01.staging")));
        if days.join("day00").join("complete.json").is_file() && staging {
            break;
        }
        assert!(child.try_wait().unwrap().is_none(), "the batch ended before it could be killed");
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    child.kill().unwrap();
    let killed = child.wait_with_output().unwrap();
    let progress = String::from_utf8_lossy(&killed.stderr);
    // Standard error is a pipe here, so the progress comes as lines (a terminal gets the bar).
    assert!(progress.contains(&format!("batch: {DAYS} days to replay")) && progress.contains(&format!("batch: day 1/{DAYS} day00 done")), "{progress}");
    assert!(!days.join("day01").join("complete.json").exists() && !days.join("day02").exists());
    let day00_meta = read(&days.join("day00").join("run.json"));
    let o = batch_cmd().output().unwrap();
    let text = ok(&o, "resumed batch");
    assert!(text.contains(&format!("{} replayed", DAYS - 1)) && text.contains("1 already complete and skipped"), "{text}");
    let progress = String::from_utf8_lossy(&o.stderr);
    let last = format!("batch: day {0}/{0} day09 done", DAYS - 1);
    assert!(progress.contains(&format!("batch: {} days to replay", DAYS - 1)) && progress.contains("1 already complete") && progress.contains(&last), "{progress}");
    assert_eq!(read(&days.join("day00").join("run.json")), day00_meta, "the complete day was not redone");
    let leftovers: Vec<String> = std::fs::read_dir(&days).unwrap().flatten().map(|e| e.file_name().to_string_lossy().into_owned()).filter(|n| n.starts_with('.')).collect();
    assert!(leftovers.is_empty(), "left behind: {leftovers:?}");
    let single = single_run();
    for i in 0..DAYS {
        let d = format!("day{i:02}");
        for file in ["stats.csv", "sky_stats.csv"] {
            assert_eq!(read(&single.join("days").join(&d).join(file)), read(&days.join(&d).join(file)), "{d}: {file} differs from the uninterrupted run");
        }
        let meta = json(&days.join(&d).join("run.json"));
        assert_eq!(meta["kind"], "day");
        assert_eq!(meta["nephocast_version"], env!("CARGO_PKG_VERSION"));
        assert!(meta["first_frame_utc"].as_str().unwrap() < meta["last_frame_utc"].as_str().unwrap());
        assert!(meta["run_start_utc"].as_str().unwrap() <= meta["run_end_utc"].as_str().unwrap());
    }
    for file in ["stats.csv", "scores.csv", "sky_stats.csv", "days.csv"] {
        assert_eq!(read(&single.join("aggregate").join(file)), read(&out.join("aggregate").join(file)), "aggregate {file} differs from the uninterrupted run");
    }
    // A third run has nothing to do.
    let text = ok(&batch_cmd().arg("--quiet").output().unwrap(), "third batch");
    assert!(text.contains("0 replayed") && text.contains(&format!("{DAYS} already complete")), "{text}");
    if cfg!(feature = "parquet") {
        check_parquet_with_pandas(&out);
    }
}

/// `tools/check_parquet_pandas.py` on a batch folder: every day's `forecasts.parquet` read by pandas
/// with the values of its `forecasts.csv`.
fn check_parquet_with_pandas(out: &Path) {
    for i in 0..DAYS {
        assert!(out.join("days").join(format!("day{i:02}")).join("forecasts.parquet").is_file(), "day{i:02} has no forecasts.parquet");
    }
    let tool = Path::new(env!("CARGO_MANIFEST_DIR")).join("tools/check_parquet_pandas.py");
    match Command::new("python3").arg(&tool).arg(out).output() {
        Err(e) => eprintln!("python3 could not be run ({e}): the pandas check is SKIPPED"),
        Ok(o) if o.status.code() == Some(2) => eprintln!("the pandas check is SKIPPED: {}", String::from_utf8_lossy(&o.stderr)),
        Ok(o) => {
            let says = String::from_utf8_lossy(&o.stdout).into_owned() + &String::from_utf8_lossy(&o.stderr);
            assert!(o.status.success(), "pandas does not read the Parquet files as the CSV: {says}");
            assert_eq!(says.matches("pass").count(), DAYS, "{says}");
            println!("{says}");
        }
    }
}

/// Sky types from the truth's clear-sky index: the clear days are clear, the broken-cumulus days
/// variable; every issue time with a plant pair at 5–15 min is counted once; the aggregate's sky
/// sums are the days' added in order, and its report shows the table.
#[test]
fn sky_types_per_day_and_in_the_aggregate() {
    let single = single_run();
    let agg = single.join("aggregate");
    let days: Vec<csv::StringRecord> = csv::Reader::from_path(agg.join("days.csv")).unwrap().records().map(Result::unwrap).collect();
    let mut by_scene: std::collections::BTreeMap<&str, Vec<String>> = Default::default();
    for (i, r) in days.iter().enumerate() {
        by_scene.entry(day_scene(i)).or_default().push(r[10].to_string());
        // Issue times counted: those with a plant pair at 5 min are among them.
        let counted: u64 = (6..10).map(|k| r[k].parse::<u64>().unwrap()).sum();
        let rec = json(&single.join("days").join(&r[0]).join("complete.json"));
        assert_eq!(rec["sky_issues"].as_object().unwrap().values().map(|v| v.as_u64().unwrap()).sum::<u64>(), counted);
        assert!(counted >= 5, "{}: {counted} issue times classed", &r[0]);
    }
    println!("dominant sky type per day, by scene: {by_scene:?}");
    assert!(by_scene["clear-day"].iter().all(|t| t == "clear"), "{by_scene:?}");
    assert!(by_scene["broken-cumulus-fast"].iter().all(|t| t == "variable"), "{by_scene:?}");
    assert!(by_scene["overcast-breaking"].iter().all(|t| t != "clear"), "{by_scene:?}");
    // The aggregate's sky sums are the days' sums added in day order.
    let mut sum = nephocast::stats::StatsTable::default();
    for r in &days {
        sum.add(&nephocast::stats::StatsTable::read_csv_keyed(&single.join("days").join(&r[0]).join("sky_stats.csv"), "sky_type").unwrap());
    }
    assert_eq!(nephocast::stats::StatsTable::read_csv_keyed(&agg.join("sky_stats.csv"), "sky_type").unwrap(), sum);
    // Per sky type, the plant pairs add up to the plant's own.
    let plant = nephocast::stats::StatsTable::read_csv(&agg.join("stats.csv")).unwrap();
    for h in [300u32, 600, 900] {
        let n: u64 = sum.rows.iter().filter(|(k, _)| k.1 == h).map(|(_, s)| s.n).sum();
        assert_eq!(n, plant.rows[&("plant".to_string(), h)].n, "pairs at {h} s");
    }
    let html = read(&agg.join("report.html"));
    assert!(html.contains("id='sky-type-table'") && html.contains("Hoff &amp; Perez 2010"), "no sky-type table");
    for t in ["clear", "variable"] {
        assert!(html.contains(&format!("<tr><td style='text-align:left'>{t}</td>")), "no {t} row");
    }
}

/// A day's scores from its sums agree with `verify::evaluate` on the same replay.
#[test]
fn day_scores_agree_with_verify() {
    let f = fixture();
    let single = single_run();
    let day = single.join("days").join("day03");
    let e = nephocast::verify::evaluate(&f.days().join("day03"), &day).unwrap();
    let mut rdr = csv::Reader::from_path(day.join("scores.csv")).unwrap();
    let mut checked = 0;
    for r in rdr.records() {
        let r = r.unwrap();
        if &r[0] != "plant" {
            continue;
        }
        let h: u32 = r[1].parse().unwrap();
        let Some(v) = e.plant.iter().find(|x| x.horizon_s == h) else { continue };
        let rmse: f64 = r[3].parse().unwrap();
        assert_eq!(r[2].parse::<usize>().unwrap(), v.n, "{h} s");
        assert!((rmse - v.rmse_wm2).abs() <= 1e-9 * v.rmse_wm2.max(1.0), "{h} s: {rmse} against {}", v.rmse_wm2);
        checked += 1;
    }
    assert!(checked >= 5, "{checked} horizons compared");
    let digest = json(&day.join("run.json"))["config_sha256"].as_str().unwrap().to_string();
    assert_eq!(digest, nephocast::batch::config_digest(&f.site()).unwrap());
    assert_eq!(digest.len(), 64);
}

/// The Slurm array script, run as its tasks with the array variables set by hand (no Slurm
/// needed), then in its merge mode: the same aggregate as one run. Its submit mode, with a stand-in
/// `sbatch`, submits the array and a merge job that depends on it.
#[test]
fn slurm_array_script_runs_by_hand() {
    let f = fixture();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy/slurm/replay-array.sh");
    let out = f.root.join("slurm");
    let run = |mode: &str, vars: &[(&str, String)]| {
        let mut c = Command::new("bash");
        c.arg(&script).arg(mode);
        c.env("NEPHOCAST_BIN", env!("CARGO_BIN_EXE_nephocast")).env("NEPHOCAST_SITE", f.site()).env("NEPHOCAST_DAYS", f.days()).env("NEPHOCAST_OUT", &out).env("NEPHOCAST_SHARDS", "4");
        for (k, v) in vars {
            c.env(k, v);
        }
        c.output().unwrap()
    };
    for k in 0..4 {
        // Tasks numbered 1 … 4, as `--array=1-4` would: the shard is the ID less the minimum.
        let vars = [("SLURM_ARRAY_TASK_ID", (k + 1).to_string()), ("SLURM_ARRAY_TASK_MIN", "1".to_string()), ("SLURM_ARRAY_TASK_COUNT", "4".to_string())];
        ok(&run("task", &vars), "slurm task");
        assert_eq!(json(&out.join(format!("shard-{k}")).join("aggregate").join("run.json"))["shard"], format!("{k}/4"));
    }
    ok(&run("merge", &[]), "slurm merge");
    let single = single_run();
    assert_eq!(read(&single.join("aggregate").join("scores.csv")), read(&out.join("merged").join("scores.csv")));
    // Submit with a stand-in sbatch that logs its arguments.
    let fake = f.root.join("fake-slurm");
    std::fs::create_dir_all(&fake).unwrap();
    let log = fake.join("sbatch.log");
    std::fs::write(fake.join("sbatch"), format!("#!/bin/sh\necho \"$@\" >> {}\necho 4242\n", log.display())).unwrap();
    std::process::Command::new("chmod").arg("+x").arg(fake.join("sbatch")).status().unwrap();
    let path = format!("{}:{}", fake.display(), std::env::var("PATH").unwrap_or_default());
    ok(&run("submit", &[("PATH", path)]), "slurm submit");
    let calls = read(&log);
    let lines: Vec<&str> = calls.lines().collect();
    assert_eq!(lines.len(), 2, "{calls}");
    assert!(lines[0].contains("--array=0-3") && lines[0].ends_with("task"), "{calls}");
    assert!(lines[1].contains("--dependency=afterok:4242") && lines[1].ends_with("merge"), "{calls}");
}

/// The Kubernetes manifests: an Indexed Job whose pods run shard `JOB_COMPLETION_INDEX` of as many
/// shards as completions, and a merge job over exactly those shard folders.
#[test]
fn k8s_indexed_job_manifest() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy/k8s");
    let job: serde_yaml::Value = serde_yaml::from_str(&read(&dir.join("replay-indexed-job.yaml"))).unwrap();
    assert_eq!(job["apiVersion"].as_str(), Some("batch/v1"));
    assert_eq!(job["kind"].as_str(), Some("Job"));
    let spec = &job["spec"];
    assert_eq!(spec["completionMode"].as_str(), Some("Indexed"));
    let completions = spec["completions"].as_u64().unwrap();
    let parallelism = spec["parallelism"].as_u64().unwrap();
    assert!(completions >= 1 && (1..=completions).contains(&parallelism), "{completions} completions, {parallelism} parallel");
    let pod = &spec["template"]["spec"];
    assert_eq!(pod["restartPolicy"].as_str(), Some("Never"));
    let c = &pod["containers"][0];
    let env = c["env"].as_sequence().unwrap();
    let shards = env.iter().find(|e| e["name"].as_str() == Some("NEPHOCAST_SHARDS")).unwrap()["value"].as_str().unwrap();
    assert_eq!(shards.parse::<u64>().unwrap(), completions, "NEPHOCAST_SHARDS must equal completions");
    let cmd: Vec<&str> = c["command"].as_sequence().unwrap().iter().chain(c["args"].as_sequence().unwrap()).map(|v| v.as_str().unwrap()).collect();
    let line = cmd.join(" ");
    for part in ["replay --batch", "--shard \"${JOB_COMPLETION_INDEX}/${NEPHOCAST_SHARDS}\"", "--out \"/data/replay/shard-${JOB_COMPLETION_INDEX}\""] {
        assert!(line.contains(part), "command lacks {part}: {line}");
    }
    // The command line parses as the binary's own arguments once the shell has filled in the index.
    let filled = line.replace("${JOB_COMPLETION_INDEX}", "2").replace("${NEPHOCAST_SHARDS}", shards).replace('"', "");
    let args: Vec<&str> = filled.split_whitespace().skip_while(|w| *w != "nephocast").collect();
    let parsed = <nephocast::cli::Cli as clap::Parser>::try_parse_from(&args);
    assert!(parsed.is_ok(), "{args:?}: {:?}", parsed.err());
    let merge: serde_yaml::Value = serde_yaml::from_str(&read(&dir.join("merge-job.yaml"))).unwrap();
    let m = merge["spec"]["template"]["spec"]["containers"][0]["args"][0].as_str().unwrap();
    for k in 0..completions {
        assert!(m.contains(&format!("/data/replay/shard-{k} ")) || m.ends_with(&format!("/data/replay/shard-{k}")), "merge lacks shard {k}: {m}");
    }
    assert!(!m.contains(&format!("shard-{completions}")));
}
