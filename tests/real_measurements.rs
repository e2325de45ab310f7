//! Measurement quality control on real 1-minute irradiance.
//!
//! Data (read from `$NEPHOCAST_DATASETS/irradiance`, not copied here):
//! * BSRN Payerne (46.815 N, 6.944 E, 491 m), 1–15 June 2016 — BSRN (Driemel et al., *Earth Syst.
//!   Sci. Data* 10:1491, 2018), station run by MeteoSwiss; taken from pvlib's test data.
//! * SURFRAD-format station Alamosa (37.70 N, 105.92 W, 2317 m), 2016-01-01, a clear winter day —
//!   NOAA Global Monitoring Laboratory; taken from pvlib's test data.
mod common;

use chrono::{DateTime, Duration, NaiveDate, Utc};
use nephocast::qc::*;
use nephocast::sun::Observer;

fn read_bsrn(path: &std::path::Path) -> (Vec<DateTime<Utc>>, Vec<f64>, Vec<f64>, Vec<f64>) {
    let m = nephocast::io::Measurements::read_csv(path).unwrap();
    let col = |n: &str| m.columns[m.column(n).unwrap()].clone();
    (m.times.clone(), col("ghi"), col("dni"), col("dhi"))
}

#[test]
fn bsrn_payerne_month_and_injected_faults() {
    let Some(root) = common::datasets() else { return };
    let (t, mut ghi, mut dni, dhi) = read_bsrn(&root.join("irradiance/bsrn_payerne_2016_06/bsrn_pay_2016-06-01_to_15_1min.csv"));
    let obs = Observer::new(46.815, 6.944, 491.0);
    let flags = qc_series(&t, &ghi, &dni, &dhi, &obs);
    let count = |f: u16| flags.iter().filter(|x| **x & f != 0).count();
    eprintln!(
        "BSRN Payerne June 1–15 2016, {} rows: physically impossible GHI {} DNI {} DHI {}; extremely rare GHI {} DNI {} DHI {}; closure {}; missing {}; stuck {}; gaps {}",
        t.len(),
        count(FLAG_GHI_PHYSICAL),
        count(FLAG_DNI_PHYSICAL),
        count(FLAG_DHI_PHYSICAL),
        count(FLAG_GHI_RARE),
        count(FLAG_DNI_RARE),
        count(FLAG_DHI_RARE),
        count(FLAG_CLOSURE),
        count(FLAG_MISSING),
        count(FLAG_STUCK),
        count(FLAG_GAP)
    );
    // Published BSRN data: no physically impossible values.
    assert_eq!(count(FLAG_GHI_PHYSICAL) + count(FLAG_DNI_PHYSICAL) + count(FLAG_DHI_PHYSICAL), 0);
    // Inject faults at local noon of 3 June and check each is flagged.
    let noon = t.iter().position(|x| *x == "2016-06-03T11:30:00Z".parse::<DateTime<Utc>>().unwrap()).unwrap();
    ghi[noon] = 2500.0; // beyond physically possible
    dni[noon + 5] = 1500.0; // beyond the solar constant
    for v in ghi.iter_mut().skip(noon + 20).take(15) {
        *v = 432.0; // stuck
    }
    let mut t2 = t.clone();
    for x in t2.iter_mut().skip(noon + 60) {
        *x += Duration::minutes(10); // a gap
    }
    let f2 = qc_series(&t2, &ghi, &dni, &dhi, &obs);
    assert_ne!(f2[noon] & FLAG_GHI_PHYSICAL, 0);
    assert_ne!(f2[noon + 5] & FLAG_DNI_PHYSICAL, 0);
    assert!(f2[noon + 20..noon + 35].iter().all(|f| f & FLAG_STUCK != 0));
    assert_ne!(f2[noon + 60] & FLAG_GAP, 0);
}

#[test]
fn surfrad_clear_day_is_clean() {
    let Some(root) = common::datasets() else { return };
    let text = std::fs::read_to_string(root.join("irradiance/pvlib_sdist_tests_data/surfrad-slv16001.dat")).unwrap();
    let (mut t, mut ghi, mut dni, mut dhi) = (vec![], vec![], vec![], vec![]);
    for line in text.lines().skip(2) {
        let f: Vec<f64> = line.split_whitespace().map(|x| x.parse().unwrap()).collect();
        let d = NaiveDate::from_ymd_opt(f[0] as i32, f[2] as u32, f[3] as u32).unwrap();
        t.push(d.and_hms_opt(f[4] as u32, f[5] as u32, 0).unwrap().and_utc());
        // SURFRAD columns: dw_solar (GHI) 8, direct_n 12, diffuse 14; -9999.9 is missing.
        let v = |i: usize| if f[i] < -9000.0 { f64::NAN } else { f[i] };
        ghi.push(v(8));
        dni.push(v(12));
        dhi.push(v(14));
    }
    // The file gives the longitude unsigned; Alamosa is west.
    let obs = Observer::new(37.70, -105.92, 2317.0);
    let flags = qc_series(&t, &ghi, &dni, &dhi, &obs);
    let flagged: Vec<String> = flags.iter().zip(&t).filter(|(f, _)| **f != 0).map(|(f, t)| format!("{t}:{f}")).take(10).collect();
    eprintln!("SURFRAD Alamosa 2016-01-01: {} rows, {} flagged", t.len(), flags.iter().filter(|f| **f != 0).count());
    assert!(flagged.is_empty(), "clear day flagged: {flagged:?}");
}
