//! The engine thread of live mode ([`LiveEngine`]): frames from the watcher through the nowcaster,
//! and the reports of each step.

use std::collections::HashSet;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use chrono::{DateTime, Utc};
use tokio::sync::broadcast;

use super::shared::Shared;
use super::watch::{Folder, Watcher};
use super::{LiveOptions, db, modbus, modbus_feed, notify, ops};
use crate::io::fmt_time;
use crate::nowcast::{Frame, Nowcast, Nowcaster, Rejection};
use crate::records::nowcast_json;

/// The engine thread of live mode: the nowcaster with its state and everything it reports to
/// (SQLite log, shared health and latest nowcast, event stream, Modbus registers, webhook). Each
/// poll: prune the archive, take measurement rows, note untimed files, reject frames dated ahead of
/// the clock, then step the newest ready frame and report it.
pub(super) struct LiveEngine {
    opts: LiveOptions,
    nc: Nowcaster,
    conn: rusqlite::Connection,
    shared: Arc<Mutex<Shared>>,
    tx: broadcast::Sender<String>,
    registers: Arc<modbus::Feed>,
    notifier: Option<notify::Notifier>,
    watch: Watcher,
    folder: Folder,
    intake: crate::intake::IntakeOptions,
    /// The site's display time zone, given with every nowcast (times stay UTC).
    time_zone: serde_json::Value,
    processed: usize,
    feed: Option<FeedSource>,
    tuning_reset_done: bool,
    untimed_seen: HashSet<String>,
    untimed_in_folder: usize,
    pruned_at: Option<std::time::Instant>,
    /// Whether the configured base's rejection by shadow timing has been logged.
    base_rejection_logged: bool,
    /// How the frames' names carry their time (`[camera] frame_time_format`).
    naming: crate::io::FrameNaming,
    /// Whether the first shadow-timing fit held back from judging the configured base was logged.
    held_back_logged: bool,
    /// Whether fits that disagreed with the configured base but could not be checked were logged.
    unchecked_logged: bool,
    /// Whether the followed colour balance and a differing exposure were logged
    /// ([`crate::replay::colour_balance_note`], [`crate::replay::exposure_note`]).
    camera_notes_logged: [bool; 2],
    /// The second camera's frames as the poll's last offer listed them, for their retirement
    /// once the poll's step is settled (the folder is not listed twice).
    second_listing: Option<Vec<crate::io::FrameRef>>,
}

/// What a frame's step gave, for the reports after it.
struct Stepped {
    frame: Result<Frame, Rejection>,
    result: Result<Nowcast, Rejection>,
    latency_ms: f64,
}


/// How many of a poll's frames, newest first, are tried when the newest does not read (cut,
/// corrupt, wrong size); the rest are skipped. Bounded so that a folder of frames that all fail
/// (a camera that changed resolution, a restart over a kept folder) costs a poll a few decodes,
/// not one per file.
pub(crate) const NEWEST_TRIES: usize = 3;
impl LiveEngine {
    #[allow(clippy::too_many_arguments)]
    pub(super) fn new(
        opts: LiveOptions,
        nc: Nowcaster,
        conn: rusqlite::Connection,
        shared: Arc<Mutex<Shared>>,
        tx: broadcast::Sender<String>,
        registers: Arc<modbus::Feed>,
        notifier: Option<notify::Notifier>,
        feed: Option<FeedSource>,
    ) -> LiveEngine {
        let intake = nc.intake_options();
        let time_zone = serde_json::to_value(nc.site().file.site.time_zone()).unwrap_or_default();
        let naming = nc.site().file.camera.frame_naming();
        LiveEngine {
            opts,
            nc,
            conn,
            shared,
            tx,
            registers,
            notifier,
            watch: Watcher::default(),
            folder: Folder::default(),
            intake,
            time_zone,
            processed: 0,
            feed,
            tuning_reset_done: false,
            untimed_seen: HashSet::new(),
            untimed_in_folder: 0,
            pruned_at: None,
            base_rejection_logged: false,
            naming,
            held_back_logged: false,
            unchecked_logged: false,
            camera_notes_logged: [false; 2],
            second_listing: None,
        }
    }

    fn log(&self, fields: &[(&str, String)]) {
        eprintln!("{}", ops::log_line(fields, self.opts.health.log_json));
    }

    /// Poll until `stop` is set.
    pub(super) fn run(mut self, stop: Arc<AtomicBool>) {
        if let Ok(mut s) = self.shared.lock() {
            s.health.running = true;
        }
        while !stop.load(Ordering::SeqCst) {
            std::thread::sleep(std::time::Duration::from_millis(self.opts.poll_ms));
            self.prune_archive();
            if let Some(f) = self.feed.as_mut() {
                feed_step(f, &mut self.nc, &self.shared, &mut self.tuning_reset_done, &self.opts.health);
            }
            // Listed again only when the folder changed (or every few seconds); files not yet taken,
            // or taken lately, are examined every poll either way.
            let Ok(listing) = self.folder.refresh(&self.opts.incoming, &self.naming) else { continue };
            let poll = self.watch.poll(listing);
            self.note_untimed(self.folder.untimed);
            for note in &poll.notes {
                eprintln!("nephocast live: {note}");
            }
            if !poll.notes.is_empty()
                && let Ok(mut s) = self.shared.lock()
            {
                s.health.frames_changed = self.watch.changed;
            }
            // Frames dated ahead of the clock are rejected one by one (they must not hide the
            // newest good frame, e.g. after a restart with a future-dated file still in the folder).
            let now = Utc::now();
            let tol = self.nc.site().file.qc.max_ahead_of_clock_s;
            let (future, ready): (Vec<_>, Vec<_>) = poll.ready.into_iter().partition(|f| (f.time - now).num_milliseconds() as f64 / 1000.0 > tol);
            self.reject_future(&future, now);
            // Newest first; a newest frame that does not read (cut, corrupt, wrong size) is
            // reported and gives way to the next newest waiting, so a burst whose last upload broke
            // still gives a nowcast.
            let mut order = ready.clone();
            order.sort_by(|a, b| b.time.cmp(&a.time).then_with(|| b.path.cmp(&a.path)));
            let Some(mut newest) = order.first().cloned() else { continue };
            let mut stepped = self.step(&newest);
            let mut tried = 1;
            while matches!(&stepped.result, Err(Rejection::Intake(_) | Rejection::Unreadable(_) | Rejection::WrongSize { .. })) && tried < order.len().min(NEWEST_TRIES) {
                self.report(&newest, stepped, 0);
                newest = order[tried].clone();
                tried += 1;
                stepped = self.step(&newest);
            }
            // The second camera's frames are retired once the poll's step is settled: a first
            // frame that did not read must not retire the second frame its fallback pairs with.
            self.retire_second_frames(&newest.time);
            for line in skip_lines(&order[tried..]) {
                self.log(&line);
            }
            self.note_base_rejected();
            self.note_camera_settings();
            self.report(&newest, stepped, order.len() - tried);
            retire_all(&ready, &self.opts.health.retention, &self.shared, self.opts.health.log_json);
        }
        if let Ok(mut s) = self.shared.lock() {
            s.health.running = false;
        }
    }

    /// Log once each of `replay`'s closing notes on the camera's settings against the calibration
    /// day's: a followed colour balance, an exposure that differs (an `event` `camera_settings`).
    /// (The health report carries the same figures: `clear_rb_scale`, `exposure`.)
    fn note_camera_settings(&mut self) {
        let r = self.nc.reference();
        let (scale, exposure) = ((f64::from(r.ratio_scale()), r.ratio_shift_frames), r.mean_exposure());
        let notes = [crate::replay::colour_balance_note(scale, exposure), crate::replay::exposure_note(scale, exposure)];
        for (i, note) in notes.into_iter().enumerate() {
            if let Some(note) = note.filter(|_| !self.camera_notes_logged[i]) {
                self.camera_notes_logged[i] = true;
                self.log(&[("event", "camera_settings".into()), ("note", note)]);
            }
        }
    }

    /// Log once when shadow timing at the pyranometers has rejected the configured cloud base,
    /// naming how the measurements' times are read (a mislabelled logger is the first thing to
    /// check when the base is known good: DEVELOPERS.md, "Where the design changed").
    ///
    /// Also once when a fit that disagreed with the configured base was first held back because the
    /// readings did not follow the map's shadows better than shifted in time (the configured base
    /// is kept; readings an hour late, a logger on local time, do this), and once when fits that
    /// disagreed with it could not be checked at all over the stretch the check needs
    /// ([`crate::cbh::CbhState::base_left_unchecked`]; `replay` ends with the same note).
    fn note_base_rejected(&mut self) {
        let held = self.nc.cbh_state().fits_held_back();
        if !self.held_back_logged && held > 0 && !self.nc.cbh_state().prior_rejected() {
            self.held_back_logged = true;
            let label = self.nc.site().file.measurements.time_label.name();
            self.log(&[
                ("event", "cloud_base".into()),
                ("note", format!("a shadow-timing fit disagreed with the configured cloud base, but the pyranometer readings did not follow the cloud map's shadows better than the same readings shifted in time: configured base kept; check the readings' clock and time zone (UTC expected), [measurements] time_label (read as \"{label}\") and the pyranometers' positions")),
            ]);
        }
        if !self.unchecked_logged
            && !self.nc.cbh_state().prior_rejected()
            && let Some(n) = self.nc.cbh_state().base_left_unchecked()
        {
            self.unchecked_logged = true;
            let minutes = self.nc.cbh_state().shadow_check_window_s().unwrap_or(600.0) / 60.0;
            self.log(&[
                ("event", "cloud_base".into()),
                ("note", format!("{n} shadow-timing fits disagreed with the configured cloud base, but none could be checked against the same readings shifted in time: that check needs {minutes:.0} minutes of frames with pyranometer readings, without gaps; the configured base is kept unchecked. Check the base, or set [clouds] shadow_timing = true to combine the fits with it")),
            ]);
        }
        if self.base_rejection_logged || !self.nc.cbh_state().prior_rejected() {
            return;
        }
        self.base_rejection_logged = true;
        let label = self.nc.site().file.measurements.time_label.name();
        self.log(&[
            ("event", "cloud_base".into()),
            ("note", format!("shadow timing at the pyranometers rejected the configured cloud base; if that base is right, check the readings' clock and time zone (UTC expected), [measurements] time_label (read as \"{label}\") and the pyranometers' positions")),
        ]);
    }

    /// Remove archived frames beyond their keep time, at most once an hour.
    fn prune_archive(&mut self) {
        if let (ops::Retention::Archive(dir), Some(days)) = (&self.opts.health.retention, self.opts.health.archive_keep_days)
            && self.pruned_at.is_none_or(|t| t.elapsed().as_secs() >= 3600)
        {
            self.pruned_at = Some(std::time::Instant::now());
            for p in ops::prune_archive(dir, days, Utc::now().date_naive()) {
                self.log(&[("event", "retention".into()), ("folder", p.display().to_string()), ("done", format!("removed (older than {days} days)"))]);
            }
        }
    }

    /// Log each file without a time in its name once, and show the last 20 in the health.
    fn note_untimed(&mut self, untimed: usize) {
        if untimed == self.untimed_in_folder {
            return;
        }
        self.untimed_in_folder = untimed;
        let new: Vec<String> = ops::untimed_files(&self.opts.incoming, &self.naming).into_iter().filter(|n| self.untimed_seen.insert(n.clone())).collect();
        for n in &new {
            self.log(&[("event", "untimed".into()), ("file", n.clone()), ("reason", format!("no time in the name (expected {})", self.naming.expected()))]);
        }
        if !new.is_empty()
            && let Ok(mut s) = self.shared.lock()
        {
            s.health.frames_untimed = self.untimed_seen.len();
            s.health.untimed_files.extend(new);
            let n = s.health.untimed_files.len();
            s.health.untimed_files.drain(..n.saturating_sub(20));
        }
    }

    /// Reject (count, announce, log, retire) the frames dated beyond the clock's tolerance.
    fn reject_future(&mut self, future: &[crate::io::FrameRef], now: DateTime<Utc>) {
        let valid_now = self.shared.lock().map(|s| s.health.data_valid).unwrap_or(false);
        for f in future {
            if let Err(r) = self.nc.judge_clock(f.time, now) {
                let _ = self.tx.send(serde_json::json!({"type": "rejected", "file": f.path.file_name().map(|x| x.to_string_lossy().into_owned()), "reason": r.to_string(), "data_valid": valid_now}).to_string());
                self.log(&[("event", "frame".into()), ("file", file_name(&f.path)), ("time", fmt_time(&f.time)), ("outcome", "rejected".into()), ("reason", r.to_string())]);
            }
        }
        retire_all(future, &self.opts.health.retention, &self.shared, self.opts.health.log_json);
        if !future.is_empty()
            && let Ok(mut s) = self.shared.lock()
        {
            s.health.frames_rejected = self.nc.counters.rejected.clone();
        }
    }

    /// The clock policy (from the name alone), intake, then the engine; the controller's
    /// registers are published first, before logging and pictures. Older than what was already
    /// processed: out of order, counted by the engine.
    fn step(&mut self, newest: &crate::io::FrameRef) -> Stepped {
        let t0 = std::time::Instant::now();
        self.offer_second_frame(&newest.time);
        let intake = &self.intake;
        let crate::nowcast::Stepped { frame, result, clock_note } = self.nc.step_with(newest.time, Utc::now(), || crate::intake::read_frame(&newest.path, intake));
        if let Some(n) = clock_note {
            eprintln!("nephocast live: {n}");
        }
        if let Ok(n) = &result {
            self.registers.publish(n);
        }
        self.watch.taken(newest, result.is_ok());
        Stepped { frame, result, latency_ms: t0.elapsed().as_secs_f64() * 1000.0 }
    }

    /// The second camera's ready frames (`None` without `[second_camera] incoming`).
    fn list_second_frames(&self) -> Option<Vec<crate::io::FrameRef>> {
        let dir = self.nc.site().second_camera.as_ref().and_then(|s| s.incoming.clone())?;
        // Written by rename, as the first camera's: a listed frame is whole.
        crate::io::list_frames_named(&dir, &self.naming).ok().map(|(ready, _)| ready)
    }

    /// With `[second_camera] incoming`: offer the engine the second camera's ready frame nearest in
    /// time to `t` (decoded whole, as replay does). A second frame that does not read is logged and
    /// left out; the step goes on.
    fn offer_second_frame(&mut self, t: &DateTime<Utc>) {
        let Some(ready) = self.list_second_frames() else { return };
        let near = nearest_second_frame(&ready, t);
        self.second_listing = Some(ready);
        let Some(f) = near else { return };
        match crate::intake::read_frame(&f.path, &crate::intake::IntakeOptions::default()) {
            Ok(img) => self.nc.offer_second_frame(f.time, img),
            Err(e) => self.log(&[("event", "second_frame".into()), ("file", file_name(&f.path)), ("outcome", "unreadable".into()), ("reason", e.to_string())]),
        }
    }

    /// With `[second_camera] incoming`: retire (by the retention policy) the second camera's frame
    /// nearest to `t`, the first camera's frame the poll settled on, and those too old to pair with
    /// a later frame (a frame newer than `t` stays for the next step).
    fn retire_second_frames(&mut self, t: &DateTime<Utc>) {
        let Some(ready) = self.second_listing.take().or_else(|| self.list_second_frames()) else { return };
        let near = nearest_second_frame(&ready, t);
        let slack_ms = (crate::config::SECOND_FRAME_SLACK_S * 1000.0) as i64;
        let done: Vec<crate::io::FrameRef> = ready.into_iter().filter(|f| near.as_ref().is_some_and(|n| n.path == f.path) || (*t - f.time).num_milliseconds() > slack_ms).collect();
        let r = &self.opts.health.retention;
        let mut n = 0;
        for f in &done {
            match ops::retire_as(&f.path, &f.time, r, "second-") {
                Ok(Some(what)) => {
                    n += 1;
                    self.log(&[("event", "retention".into()), ("file", file_name(&f.path)), ("done", what)]);
                }
                Ok(None) => {}
                Err(e) => self.log(&[("event", "retention".into()), ("file", file_name(&f.path)), ("error", e.to_string())]),
            }
        }
        if n > 0
            && let Ok(mut s) = self.shared.lock()
        {
            s.health.frames_retired += n;
        }
    }

    /// Report a stepped frame: health, history and alarm log, notification, events, overlay, the
    /// per-frame log line and the shared state.
    fn report(&mut self, newest: &crate::io::FrameRef, st: Stepped, skipped: usize) {
        let (valid, health_state, frame_age) = match self.shared.lock() {
            Ok(mut s) => {
                if st.frame.is_ok() {
                    // Night is judged from the newest frame read: a late upload of an older frame
                    // (refused out of order, or for the sun if it is older still) leaves it.
                    if s.ops.newest_read.is_none_or(|t| newest.time > t) {
                        s.ops.sun_down_frame = matches!(st.result, Err(Rejection::SunTooLow(_))).then_some(newest.time);
                    }
                    s.ops.newest_read = s.ops.newest_read.max(Some(newest.time));
                    s.ops.last_read_wall = Some(std::time::Instant::now());
                    s.health.newest_frame_utc = s.ops.newest_read.map(|t| fmt_time(&t));
                }
                if st.result.is_ok() {
                    s.last_time = Some(newest.time);
                }
                s.refresh_health(false);
                (s.health.data_valid, s.health.health_state.clone(), s.health.frame_age_s)
            }
            Err(_) => (false, String::new(), None),
        };
        self.registers.set_health_valid(valid);
        let mut events = vec![];
        let (mut overlay, mut latest) = (None, None);
        match &st.result {
            Ok(n) => {
                self.processed += 1;
                latest = Some(self.latest_json(n));
                self.log_nowcast(n, valid, &mut events);
                events.push(serde_json::json!({"type": "nowcast", "issue_time_utc": fmt_time(&n.time), "alarm": n.alarm.name(), "data_valid": valid, "health": health_state}).to_string());
                if self.opts.overlay_every > 0 && (self.processed - 1).is_multiple_of(self.opts.overlay_every)
                    && let Ok(fr) = &st.frame {
                        overlay = Some(crate::overlay::overlay_png(&fr.image, n, &self.nc));
                    }
            }
            Err(r) => events.push(serde_json::json!({"type": "rejected", "file": newest.path.file_name().map(|x| x.to_string_lossy().into_owned()), "reason": r.to_string(), "data_valid": valid}).to_string()),
        }
        self.log_frame(newest, &st, skipped, (valid, &health_state, frame_age));
        if let Ok(mut s) = self.shared.lock() {
            s.health.frames_skipped += skipped;
            s.health.frames_processed = self.nc.counters.used;
            if self.nc.counters.used > 0 {
                let r = self.nc.reference();
                s.health.clear_rb_scale = Some(f64::from(r.ratio_scale()));
                s.health.exposure = r.mean_exposure().map(|e| e.0);
            }
            s.health.frames_rejected = self.nc.counters.rejected.clone();
            s.health.clock_reanchors = self.nc.counters.clock_reanchors;
            s.health.frames_changed = self.watch.changed;
            s.health.alarm = self.nc.alarm_state().name().into();
            s.health.alarm_current = self.nc.alarm_current();
            if st.result.is_ok() {
                s.ops.latency.observe(st.latency_ms / 1000.0);
                s.latencies.push_back(st.latency_ms);
                if s.latencies.len() > 500 {
                    s.latencies.pop_front();
                }
                s.health.last_frame_utc = Some(fmt_time(&newest.time));
            }
            if latest.is_some() {
                s.latest = latest;
            }
            if overlay.is_some() {
                s.overlay_png = overlay;
            }
        }
        for e in events {
            let _ = self.tx.send(e);
        }
    }

    /// The nowcast as `/api/nowcast` serves it: with the site's time zone and, against the
    /// forecast, what the feed measured (the pyranometers' mean and the plant's metered power over
    /// the last 30 minutes, each block meter's newest reading).
    fn latest_json(&self, n: &Nowcast) -> serde_json::Value {
        let mut j = nowcast_json(n);
        j["site_time_zone"] = self.time_zone.clone();
        // The pyranometers' measured mean over the last 30 minutes, to show against the forecast.
        j["pyranometers_measured"] = self
            .nc
            .measured_pyranometer_mean(n.time - chrono::Duration::minutes(30))
            .into_iter()
            .map(|(t, g)| serde_json::json!({"time_utc": fmt_time(&t), "ghi_wm2": g}))
            .collect::<Vec<_>>()
            .into();
        // The plant meter's (or the block meters' summed) measured power, likewise.
        j["plant_power_measured"] = self
            .nc
            .measured_plant_power(n.time - chrono::Duration::minutes(30))
            .into_iter()
            .map(|(t, p)| serde_json::json!({"time_utc": fmt_time(&t), "power_kw": p}))
            .collect::<Vec<_>>()
            .into();
        // Each block meter's newest reading, for the per-block table.
        j["blocks_power_measured"] = self
            .nc
            .measured_block_power()
            .into_iter()
            .map(|(b, t, p)| serde_json::json!({"block": b, "time_utc": fmt_time(&t), "power_kw": p}))
            .collect::<Vec<_>>()
            .into();
        j
    }

    /// The nowcast into the history, an alarm change into the alarm log, the webhook (held back
    /// while shelved) and the event stream.
    fn log_nowcast(&self, n: &Nowcast, valid: bool, events: &mut Vec<String>) {
        let plant = &n.forecast.plant;
        let h = db::HistoryRow {
            time_utc: fmt_time(&n.time),
            cloud_fraction: n.cloud_fraction,
            plant_ghi_wm2: plant.first().map(|r| r.irradiance.ghi_wm2).unwrap_or(f64::NAN),
            plant_power_kw: plant.first().map(|r| r.power_kw).unwrap_or(f64::NAN),
            speed_mps: n.motion.map(|m| m.v_mps[0].hypot(m.v_mps[1])).unwrap_or(f64::NAN),
            toward_deg: n.motion.map(|m| m.v_mps[0].atan2(m.v_mps[1]).to_degrees().rem_euclid(360.0)).unwrap_or(f64::NAN),
            alarm: n.alarm.name().into(),
        };
        let _ = db::insert_history(&self.conn, n.time.timestamp(), &h, self.opts.keep_s);
        let Some(ch) = &n.alarm_change else { return };
        let id = db::insert_alarm(&self.conn, ch).ok();
        if let Some(nf) = &self.notifier {
            match db::active_shelf(&self.conn, Utc::now()) {
                Ok(Some(shelf)) => eprintln!("alarm {} -> {} not notified: shelved until {} by {}", ch.from.name(), ch.to.name(), shelf.until_utc, shelf.shelved_by),
                _ => {
                    nf.send(serde_json::json!({"type": "alarm_change", "id": id, "change": ch, "basis": n.alarm_basis, "current": true, "data_valid": valid,
                        "advisory": "Forecasts and alarms are advisory, not a protection system."}).to_string());
                }
            }
        }
        events.push(serde_json::json!({"type": "alarm", "change": ch, "data_valid": valid}).to_string());
    }

    /// The per-frame log line.
    fn log_frame(&self, newest: &crate::io::FrameRef, st: &Stepped, skipped: usize, (valid, health_state, frame_age): (bool, &str, Option<f64>)) {
        let f1 = |v: Option<f64>| v.map(|x| format!("{x:.1}")).unwrap_or_default();
        let measurement_age = self.shared.lock().ok().and_then(|s| s.health.measurement_age_s);
        self.log(&[
            ("event", "frame".into()),
            ("file", file_name(&newest.path)),
            ("time", fmt_time(&newest.time)),
            ("outcome", if st.result.is_ok() { "used" } else { "rejected" }.into()),
            ("reason", st.result.as_ref().err().map(|r| r.to_string()).unwrap_or_default()),
            ("skipped", skipped.to_string()),
            ("latency_ms", format!("{:.0}", st.latency_ms)),
            ("cloud_fraction", st.result.as_ref().ok().map(|n| format!("{:.3}", n.cloud_fraction)).unwrap_or_default()),
            ("alarm", self.nc.alarm_state().name().into()),
            ("health", health_state.to_string()),
            ("data_valid", valid.to_string()),
            ("frame_age_s", f1(frame_age)),
            ("measurement_age_s", f1(measurement_age)),
        ]);
    }
}

/// Skipped frames logged one by one in a poll, the newest; older ones get one summary line.
const SKIP_LINES_MAX: usize = 20;

/// The log lines for the frames of one poll skipped for a newer one: one per frame for the newest
/// [`SKIP_LINES_MAX`], then one line counting the older ones with their first and last file (a
/// restart over a folder of 50,000 frames wrote 49,999 lines at once, past journald's rate limit).
fn skip_lines(skipped: &[crate::io::FrameRef]) -> Vec<Vec<(&'static str, String)>> {
    let mut skipped: Vec<&crate::io::FrameRef> = skipped.iter().collect();
    skipped.sort_by(|a, b| a.time.cmp(&b.time).then_with(|| a.path.cmp(&b.path)));
    coalesced(
        &skipped,
        |older| {
            vec![
                ("event", "frame".into()),
                ("outcome", "skipped".into()),
                ("count", older.len().to_string()),
                ("first", file_name(&older[0].path)),
                ("last", file_name(&older[older.len() - 1].path)),
                ("reason", format!("a newer frame was waiting; {} older skipped frames not listed one by one", older.len())),
            ]
        },
        |f| vec![("event", "frame".into()), ("file", file_name(&f.path)), ("time", fmt_time(&f.time)), ("outcome", "skipped".into()), ("reason", "a newer frame was waiting".into())],
    )
}

/// Log lines for `items` in order: the last [`SKIP_LINES_MAX`] one by one (`each`), any before
/// them in one line (`summary` of that non-empty run).
fn coalesced<T>(items: &[T], summary: impl FnOnce(&[T]) -> Vec<(&'static str, String)>, each: impl Fn(&T) -> Vec<(&'static str, String)>) -> Vec<Vec<(&'static str, String)>> {
    let (older, last) = items.split_at(items.len().saturating_sub(SKIP_LINES_MAX));
    let mut lines = vec![];
    if !older.is_empty() {
        lines.push(summary(older));
    }
    lines.extend(last.iter().map(each));
    lines
}

/// The second camera's frame nearest in time to `t` within [`crate::config::SECOND_FRAME_SLACK_S`].
fn nearest_second_frame(ready: &[crate::io::FrameRef], t: &DateTime<Utc>) -> Option<crate::io::FrameRef> {
    let slack_ms = (crate::config::SECOND_FRAME_SLACK_S * 1000.0) as i64;
    ready.iter().filter(|f| (f.time - *t).num_milliseconds().abs() <= slack_ms).min_by_key(|f| (f.time - *t).num_milliseconds().abs()).cloned()
}

fn file_name(p: &std::path::Path) -> String {
    p.file_name().map(|x| x.to_string_lossy().into_owned()).unwrap_or_default()
}

/// Apply the retention to judged frames, logging what was done.
fn retire_all(frames: &[crate::io::FrameRef], r: &ops::Retention, shared: &Arc<Mutex<Shared>>, log_json: bool) {
    if *r == ops::Retention::Keep {
        return;
    }
    let mut done = vec![];
    for f in frames {
        match ops::retire(&f.path, &f.time, r) {
            Ok(Some(what)) => done.push((f, what)),
            Ok(None) => {}
            Err(e) => eprintln!("{}", ops::log_line(&[("event", "retention".into()), ("file", file_name(&f.path)), ("error", e.to_string())], log_json)),
        }
    }
    for line in retention_lines(&done) {
        eprintln!("{}", ops::log_line(&line, log_json));
    }
    if !done.is_empty()
        && let Ok(mut s) = shared.lock()
    {
        s.health.frames_retired += done.len();
    }
}

/// The log lines of the frames a poll retired (`(frame, what was done)`, in the poll's order): the
/// last [`SKIP_LINES_MAX`] one by one, any before them in one line with their count, first and
/// last (a backlog archived at start-up is not a line per file).
fn retention_lines(done: &[(&crate::io::FrameRef, String)]) -> Vec<Vec<(&'static str, String)>> {
    coalesced(
        done,
        |older| vec![("event", "retention".into()), ("done", older[0].1.clone()), ("count", older.len().to_string()), ("first", file_name(&older[0].0.path)), ("last", file_name(&older[older.len() - 1].0.path))],
        |(f, what)| vec![("event", "retention".into()), ("file", file_name(&f.path)), ("done", what.clone())],
    )
}

/// Where measurement rows come from: a CSV file or folder, or a Modbus TCP device (one of them).
pub(super) enum FeedSource {
    /// `--measurements`.
    Csv(ops::MeasurementFeed),
    /// `[measurements_modbus]` in the site file.
    Modbus(Box<modbus_feed::ModbusPoller>),
}

impl FeedSource {
    /// The feed the options and the site file ask for (`one_feed` has refused both at once).
    ///
    /// # Errors
    /// The Modbus poller's thread could not be started.
    pub(super) fn open(opts: &LiveOptions, site: &crate::config::SiteFile) -> std::io::Result<Option<FeedSource>> {
        Ok(match (&site.measurements_modbus, opts.health.measurements.as_deref()) {
            (Some(s), _) => Some(FeedSource::Modbus(Box::new(modbus_feed::ModbusPoller::start(s, site)?))),
            (None, Some(p)) => Some(FeedSource::Csv(ops::MeasurementFeed::new(p))),
            (None, None) => None,
        })
    }

    fn poll(&mut self, site: &crate::config::SiteFile) -> ops::FeedPoll {
        match self {
            FeedSource::Csv(f) => f.poll(site),
            FeedSource::Modbus(p) => p.poll(site),
        }
    }

    /// Rows read and pieces refused by screening so far.
    fn counts(&self) -> (usize, usize) {
        match self {
            FeedSource::Csv(f) => (f.rows_read, f.errors),
            FeedSource::Modbus(p) => (p.rows_read, p.errors),
        }
    }

    /// The Modbus poller's state and counters.
    fn modbus_status(&self) -> Option<modbus_feed::ModbusFeedStatus> {
        match self {
            FeedSource::Csv(_) => None,
            FeedSource::Modbus(p) => Some(p.status()),
        }
    }
}

/// Read the measurement feed, append to the engine, and go back to the configured
/// transmittances once the feed is older than its limit.
fn feed_step(feed: &mut FeedSource, nc: &mut Nowcaster, shared: &Arc<Mutex<Shared>>, reset_done: &mut bool, o: &ops::HealthOptions) {
    let poll = feed.poll(&nc.site().file);
    for n in &poll.notes {
        eprintln!("nephocast live: {n}");
    }
    for (m, counts) in poll.pieces {
        for (k, v) in counts {
            *nc.counters.measurements_flagged.entry(k).or_default() += v;
        }
        nc.append_measurements(m, ops::FEED_KEEP_S);
    }
    let (rows, end) = nc.measurements_newest();
    // The tuning works in the frames' time: the feed has stopped for it when its newest reading is
    // older than the limit at the newest frame's time.
    let newest_frame = shared.lock().ok().and_then(|s| s.ops.newest_read);
    let old = newest_frame.is_some_and(|f| end.is_none_or(|t| ops::age_s(&t, &f) > o.measurement_max_age_s));
    let mut reset = false;
    if old && !*reset_done {
        reset = nc.reset_tuning();
        *reset_done = true;
        if reset {
            eprintln!("nephocast live: the measurement feed is older than {:.0} s: the tuning goes back to the configured transmittances", o.measurement_max_age_s);
        }
    } else if !old {
        *reset_done = false;
    }
    if let Ok(mut s) = shared.lock() {
        s.health.measurement_rows = rows;
        (s.health.measurement_rows_read, s.health.measurement_errors) = feed.counts();
        s.health.measurement_feed_modbus = feed.modbus_status();
        s.health.tuning_resets += usize::from(reset);
        s.health.tuning_rows = nc.tuning_rows();
        s.ops.measurement_end = end;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn many_skipped_frames_are_summed_up_in_one_line() {
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let frames: Vec<crate::io::FrameRef> =
            (0..50).map(|i| crate::io::FrameRef { time: t0 + chrono::Duration::seconds(i), path: format!("in/frame_{i:02}.jpg").into() }).collect();
        let lines = skip_lines(&frames[..49]);
        assert_eq!(lines.len(), 1 + SKIP_LINES_MAX);
        let text = ops::log_line(&lines[0], false);
        assert!(text.contains("count=29") && text.contains("first=frame_00.jpg") && text.contains("last=frame_28.jpg"), "{text}");
        assert!(ops::log_line(&lines[1], false).contains("file=frame_29.jpg"));
        assert!(ops::log_line(&lines[SKIP_LINES_MAX], false).contains("file=frame_48.jpg"));
        // A few are listed one by one, with no summary.
        assert_eq!(skip_lines(&frames[..2]).len(), 2);
    }

    #[test]
    fn a_retired_backlog_is_summed_up_in_one_line() {
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let frames: Vec<crate::io::FrameRef> =
            (0..30).map(|i| crate::io::FrameRef { time: t0 + chrono::Duration::seconds(i), path: format!("in/frame_{i:02}.jpg").into() }).collect();
        let done: Vec<_> = frames.iter().map(|f| (f, "archived".to_string())).collect();
        let lines = retention_lines(&done);
        assert_eq!(lines.len(), 1 + SKIP_LINES_MAX);
        let text = ops::log_line(&lines[0], false);
        assert!(text.contains("count=10") && text.contains("first=frame_00.jpg") && text.contains("last=frame_09.jpg") && text.contains("done=archived"), "{text}");
        assert!(ops::log_line(&lines[1], false).contains("file=frame_10.jpg"));
        assert_eq!(retention_lines(&done[..3]).len(), 3);
        assert!(retention_lines(&[]).is_empty());
    }
}
