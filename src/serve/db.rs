//! The live mode's embedded database (SQLite, bundled): the alarm log and recent history.
//!
//! Every write is its own transaction in WAL mode, so a crash loses at most the frame in flight.

use std::path::Path;

use rusqlite::{Connection, params};

use crate::ramp::{AlarmChange, AlarmState};

/// Open (and create) the database.
///
/// # Errors
/// When the file cannot be opened or its tables created.
pub fn open(path: &Path) -> rusqlite::Result<Connection> {
    let c = Connection::open(path)?;
    c.pragma_update(None, "journal_mode", "WAL")?;
    c.pragma_update(None, "synchronous", "NORMAL")?;
    c.busy_timeout(std::time::Duration::from_secs(5))?;
    c.execute_batch(
        "CREATE TABLE IF NOT EXISTS alarms (id INTEGER PRIMARY KEY, time_utc TEXT NOT NULL, from_state TEXT NOT NULL, to_state TEXT NOT NULL, probability REAL, reason TEXT, acked_utc TEXT, acked_by TEXT);
         CREATE TABLE IF NOT EXISTS history (time_utc TEXT PRIMARY KEY, unix_s INTEGER NOT NULL, cloud_fraction REAL, plant_ghi_wm2 REAL, plant_power_kw REAL, speed_mps REAL, toward_deg REAL, alarm TEXT);
         CREATE INDEX IF NOT EXISTS history_unix ON history(unix_s);
         CREATE TRIGGER IF NOT EXISTS alarms_ack_once BEFORE UPDATE OF acked_utc, acked_by ON alarms
           WHEN OLD.acked_utc IS NOT NULL BEGIN SELECT RAISE(ABORT, 'alarm already acknowledged'); END;
         CREATE TABLE IF NOT EXISTS shelves (id INTEGER PRIMARY KEY, shelved_utc TEXT NOT NULL, shelved_frame_utc TEXT, until_utc TEXT NOT NULL, until_frame_utc TEXT, minutes REAL NOT NULL, shelved_by TEXT NOT NULL);
         CREATE TRIGGER IF NOT EXISTS shelves_no_update BEFORE UPDATE ON shelves BEGIN SELECT RAISE(ABORT, 'shelving is append-only'); END;
         CREATE TRIGGER IF NOT EXISTS shelves_no_delete BEFORE DELETE ON shelves BEGIN SELECT RAISE(ABORT, 'shelving is append-only'); END;",
    )?;
    // Logs from before the frame clock was recorded with acknowledgements.
    let has_frame_col: bool = c.prepare("SELECT 1 FROM pragma_table_info('alarms') WHERE name = 'acked_frame_utc'")?.exists([])?;
    if !has_frame_col {
        c.execute_batch("ALTER TABLE alarms ADD COLUMN acked_frame_utc TEXT;")?;
    }
    c.execute_batch(
        "CREATE TRIGGER IF NOT EXISTS alarms_ack_frame_once BEFORE UPDATE OF acked_frame_utc ON alarms
           WHEN OLD.acked_utc IS NOT NULL BEGIN SELECT RAISE(ABORT, 'alarm already acknowledged'); END;",
    )?;
    Ok(c)
}

/// Record an alarm change.
///
/// # Errors
/// A database error.
pub fn insert_alarm(c: &Connection, a: &AlarmChange) -> rusqlite::Result<i64> {
    c.execute(
        "INSERT INTO alarms (time_utc, from_state, to_state, probability, reason) VALUES (?1, ?2, ?3, ?4, ?5)",
        params![a.time_utc, a.from.name(), a.to.name(), a.probability, a.reason],
    )?;
    Ok(c.last_insert_rowid())
}

/// One row of history.
#[derive(Debug, Clone, serde::Serialize)]
pub struct HistoryRow {
    /// Frame time.
    pub time_utc: String,
    /// Cloud fraction.
    pub cloud_fraction: f64,
    /// Plant-mean GHI nowcast \[W m⁻²\].
    pub plant_ghi_wm2: f64,
    /// Plant AC power nowcast \[kW\].
    pub plant_power_kw: f64,
    /// Cloud speed \[m/s\].
    pub speed_mps: f64,
    /// Cloud direction \[°\].
    pub toward_deg: f64,
    /// Alarm state.
    pub alarm: String,
}

/// Record a frame's summary and drop history older than `keep_s` before it.
///
/// # Errors
/// A database error.
pub fn insert_history(c: &Connection, unix_s: i64, r: &HistoryRow, keep_s: i64) -> rusqlite::Result<()> {
    c.execute(
        "INSERT OR REPLACE INTO history (time_utc, unix_s, cloud_fraction, plant_ghi_wm2, plant_power_kw, speed_mps, toward_deg, alarm) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
        params![r.time_utc, unix_s, r.cloud_fraction, r.plant_ghi_wm2, r.plant_power_kw, r.speed_mps, r.toward_deg, r.alarm],
    )?;
    c.execute("DELETE FROM history WHERE unix_s < ?1", params![unix_s - keep_s])?;
    Ok(())
}

/// History rows, oldest first.
///
/// # Errors
/// A database error.
pub fn history(c: &Connection, limit: usize) -> rusqlite::Result<Vec<HistoryRow>> {
    let mut st = c.prepare("SELECT time_utc, cloud_fraction, plant_ghi_wm2, plant_power_kw, speed_mps, toward_deg, alarm FROM history ORDER BY unix_s DESC LIMIT ?1")?;
    let mut rows: Vec<HistoryRow> = st
        .query_map(params![limit as i64], |r| {
            Ok(HistoryRow {
                time_utc: r.get(0)?,
                cloud_fraction: r.get::<_, Option<f64>>(1)?.unwrap_or(f64::NAN),
                plant_ghi_wm2: r.get::<_, Option<f64>>(2)?.unwrap_or(f64::NAN),
                plant_power_kw: r.get::<_, Option<f64>>(3)?.unwrap_or(f64::NAN),
                speed_mps: r.get::<_, Option<f64>>(4)?.unwrap_or(f64::NAN),
                toward_deg: r.get::<_, Option<f64>>(5)?.unwrap_or(f64::NAN),
                alarm: r.get(6)?,
            })
        })?
        .collect::<rusqlite::Result<_>>()?;
    rows.reverse();
    Ok(rows)
}

/// Count of history rows.
///
/// # Errors
/// A database error.
pub fn history_len(c: &Connection) -> rusqlite::Result<i64> {
    c.query_row("SELECT COUNT(*) FROM history", [], |r| r.get(0))
}

/// An alarm log row.
#[derive(Debug, Clone, serde::Serialize)]
pub struct AlarmRow {
    /// Row id (for acknowledging).
    pub id: i64,
    /// When.
    pub time_utc: String,
    /// From state.
    pub from: String,
    /// To state.
    pub to: String,
    /// Probability.
    pub probability: f64,
    /// Why.
    pub reason: String,
    /// When acknowledged, if it was.
    pub acked_utc: Option<String>,
    /// Who acknowledged it, if anyone did.
    pub acked_by: Option<String>,
    /// The frame clock when it was acknowledged (the newest frame's time then), if known.
    pub acked_frame_utc: Option<String>,
}

/// The most recent alarm log rows, newest first.
///
/// # Errors
/// A database error.
pub fn alarms(c: &Connection, limit: usize) -> rusqlite::Result<Vec<AlarmRow>> {
    let mut st = c.prepare("SELECT id, time_utc, from_state, to_state, probability, reason, acked_utc, acked_by, acked_frame_utc FROM alarms ORDER BY id DESC LIMIT ?1")?;
    st.query_map(params![limit as i64], |r| {
        Ok(AlarmRow {
            id: r.get(0)?,
            time_utc: r.get(1)?,
            from: r.get(2)?,
            to: r.get(3)?,
            probability: r.get::<_, Option<f64>>(4)?.unwrap_or(f64::NAN),
            reason: r.get::<_, Option<String>>(5)?.unwrap_or_default(),
            acked_utc: r.get(6)?,
            acked_by: r.get(7)?,
            acked_frame_utc: r.get(8)?,
        })
    })?
    .collect()
}

/// The state the last logged change left, if any.
///
/// # Errors
/// A database error.
pub fn last_state(c: &Connection) -> rusqlite::Result<Option<AlarmState>> {
    Ok(last_change(c)?.map(|(s, _)| s))
}

/// The last alarm change: the state it went to and its frame time.
///
/// # Errors
/// SQLite's.
pub fn last_change(c: &Connection) -> rusqlite::Result<Option<(AlarmState, Option<chrono::DateTime<chrono::Utc>>)>> {
    let s: Option<(String, String)> = c.query_row("SELECT to_state, time_utc FROM alarms ORDER BY id DESC LIMIT 1", [], |r| Ok((r.get(0)?, r.get(1)?))).ok();
    Ok(s.map(|(s, t)| {
        let state = match s.as_str() {
            // The state's name in databases written before it was renamed.
            "watch" => AlarmState::Caution,
            s => AlarmState::from_name(s).unwrap_or(AlarmState::Calm),
        };
        (state, t.parse().ok())
    }))
}

/// The newest frame time in the history (the last nowcast before a restart).
///
/// # Errors
/// SQLite's.
pub fn last_frame_time(c: &Connection) -> rusqlite::Result<Option<chrono::DateTime<chrono::Utc>>> {
    let t: Option<String> = c.query_row("SELECT time_utc FROM history ORDER BY unix_s DESC LIMIT 1", [], |r| r.get(0)).ok();
    Ok(t.and_then(|t| t.parse().ok()))
}

/// What became of an acknowledgement.
#[derive(Debug, Clone, PartialEq)]
pub enum AckOutcome {
    /// Recorded.
    Acked,
    /// The alarm had been acknowledged before; that first acknowledgement is kept.
    AlreadyAcked {
        /// When it was first acknowledged.
        acked_utc: String,
        /// By whom.
        acked_by: String,
    },
    /// No alarm has this id.
    NoSuchAlarm,
}

/// Acknowledge an alarm row. Acknowledgements are append-only: only a row not yet acknowledged is
/// written (a trigger refuses any later change of the acknowledgement, whoever writes).
///
/// # Errors
/// A database error.
pub fn ack(c: &Connection, id: i64, by: &str, now_utc: &str, frame_utc: Option<&str>) -> rusqlite::Result<AckOutcome> {
    if c.execute("UPDATE alarms SET acked_utc = ?1, acked_by = ?2, acked_frame_utc = ?4 WHERE id = ?3 AND acked_utc IS NULL", params![now_utc, by, id, frame_utc])? == 1 {
        return Ok(AckOutcome::Acked);
    }
    let first: Option<(Option<String>, Option<String>)> = c
        .query_row("SELECT acked_utc, acked_by FROM alarms WHERE id = ?1", params![id], |r| Ok((r.get(0)?, r.get(1)?)))
        .map(Some)
        .or_else(|e| if e == rusqlite::Error::QueryReturnedNoRows { Ok(None) } else { Err(e) })?;
    Ok(match first {
        None => AckOutcome::NoSuchAlarm,
        Some((at, by)) => AckOutcome::AlreadyAcked { acked_utc: at.unwrap_or_default(), acked_by: by.unwrap_or_default() },
    })
}

/// A shelving: notifications of state changes are held back until `until_utc` (wall time).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ShelfRow {
    /// Row id.
    pub id: i64,
    /// When it was shelved (wall time).
    pub shelved_utc: String,
    /// The frame clock then (the newest frame's time), if known.
    pub shelved_frame_utc: Option<String>,
    /// Shelved until (wall time).
    pub until_utc: String,
    /// Shelved until on the frame clock (the frame clock then plus the duration), if known.
    pub until_frame_utc: Option<String>,
    /// Duration \[min\].
    pub minutes: f64,
    /// Who shelved.
    pub shelved_by: String,
}

/// Record a shelving of `minutes` from `now` (wall time), with the frame clock when known.
/// Shelvings are append-only (triggers refuse changes and deletions); a later shelving replaces
/// the earlier one's end.
///
/// # Errors
/// A database error.
pub fn shelve(c: &Connection, by: &str, now: chrono::DateTime<chrono::Utc>, frame: Option<chrono::DateTime<chrono::Utc>>, minutes: f64) -> rusqlite::Result<ShelfRow> {
    let d = chrono::Duration::milliseconds((minutes * 60_000.0) as i64);
    let fmt = crate::io::fmt_time;
    let row = ShelfRow {
        id: 0,
        shelved_utc: fmt(&now),
        shelved_frame_utc: frame.as_ref().map(fmt),
        until_utc: fmt(&(now + d)),
        until_frame_utc: frame.map(|f| fmt(&(f + d))),
        minutes,
        shelved_by: by.to_string(),
    };
    c.execute(
        "INSERT INTO shelves (shelved_utc, shelved_frame_utc, until_utc, until_frame_utc, minutes, shelved_by) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        params![row.shelved_utc, row.shelved_frame_utc, row.until_utc, row.until_frame_utc, row.minutes, row.shelved_by],
    )?;
    Ok(ShelfRow { id: c.last_insert_rowid(), ..row })
}

/// The most recent shelvings, newest first.
///
/// # Errors
/// A database error.
pub fn shelves(c: &Connection, limit: usize) -> rusqlite::Result<Vec<ShelfRow>> {
    let mut st = c.prepare("SELECT id, shelved_utc, shelved_frame_utc, until_utc, until_frame_utc, minutes, shelved_by FROM shelves ORDER BY id DESC LIMIT ?1")?;
    st.query_map(params![limit as i64], |r| {
        Ok(ShelfRow { id: r.get(0)?, shelved_utc: r.get(1)?, shelved_frame_utc: r.get(2)?, until_utc: r.get(3)?, until_frame_utc: r.get(4)?, minutes: r.get(5)?, shelved_by: r.get(6)? })
    })?
    .collect()
}

/// The shelving in force at `now` (wall time): the newest one, if it has not ended.
///
/// # Errors
/// A database error.
pub fn active_shelf(c: &Connection, now: chrono::DateTime<chrono::Utc>) -> rusqlite::Result<Option<ShelfRow>> {
    Ok(shelves(c, 1)?.into_iter().next().filter(|s| s.until_utc.parse::<chrono::DateTime<chrono::Utc>>().is_ok_and(|u| u > now)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shelving_is_recorded_in_both_clocks_and_append_only() {
        let d = tempfile::tempdir().unwrap();
        let c = open(&d.path().join("a.sqlite")).unwrap();
        let now: chrono::DateTime<chrono::Utc> = "2026-12-03T04:00:00Z".parse().unwrap();
        let frame: chrono::DateTime<chrono::Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
        let s = shelve(&c, "Ann", now, Some(frame), 30.0).unwrap();
        assert_eq!(s.until_utc, "2026-12-03T04:30:00Z");
        assert_eq!(s.until_frame_utc.as_deref(), Some("2026-06-14T09:30:00Z"));
        assert_eq!(active_shelf(&c, now + chrono::Duration::minutes(29)).unwrap(), Some(s.clone()));
        assert_eq!(active_shelf(&c, now + chrono::Duration::minutes(31)).unwrap(), None);
        assert!(c.execute("UPDATE shelves SET until_utc = '2030-01-01T00:00:00Z'", []).is_err());
        assert!(c.execute("DELETE FROM shelves", []).is_err());
        // Reopening keeps it (and the migration is idempotent).
        drop(c);
        let c = open(&d.path().join("a.sqlite")).unwrap();
        assert_eq!(shelves(&c, 10).unwrap(), vec![s]);
    }

    #[test]
    fn the_first_acknowledgement_is_kept() {
        let d = tempfile::tempdir().unwrap();
        let c = open(&d.path().join("a.sqlite")).unwrap();
        let ch = AlarmChange { time_utc: "2026-06-14T09:00:00Z".into(), from: AlarmState::Calm, to: AlarmState::Caution, probability: 0.6, reason: "test".into() };
        let id = insert_alarm(&c, &ch).unwrap();
        assert_eq!(ack(&c, id, "Ana", "2026-06-14T09:01:00Z", Some("2026-06-14T08:59:40Z")).unwrap(), AckOutcome::Acked);
        assert_eq!(
            ack(&c, id, "Bo", "2026-06-14T09:02:00Z", None).unwrap(),
            AckOutcome::AlreadyAcked { acked_utc: "2026-06-14T09:01:00Z".into(), acked_by: "Ana".into() }
        );
        assert_eq!(ack(&c, id + 1, "Bo", "2026-06-14T09:02:00Z", None).unwrap(), AckOutcome::NoSuchAlarm);
        // Even a direct write cannot change it.
        assert!(c.execute("UPDATE alarms SET acked_by = 'Eve' WHERE id = ?1", params![id]).is_err());
        assert!(c.execute("UPDATE alarms SET acked_frame_utc = NULL WHERE id = ?1", params![id]).is_err());
        let rows = alarms(&c, 10).unwrap();
        assert_eq!(rows[0].acked_by.as_deref(), Some("Ana"));
        assert_eq!(rows[0].acked_utc.as_deref(), Some("2026-06-14T09:01:00Z"));
        assert_eq!(rows[0].acked_frame_utc.as_deref(), Some("2026-06-14T08:59:40Z"));
    }
}
