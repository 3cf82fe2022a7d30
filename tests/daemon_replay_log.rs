//! `spillway run --replay-log`: the daemon against the bench plant (a fixed household
//! of 400 W, a water heater and a pool pump on relays, a curtailable inverter) appends
//! its PV and household power to a CSV, and `spillway replay` takes that file as it is.
//! Paused tokio clock: the rows' times are simulated time, exact and repeatable.

mod daemon_support;
mod support;

use std::time::Duration;

use daemon_support::{HOUSE_W, LOADS, Plant, T0, options, start, status_until};
use spillway::daemon::replay_log::ReplayLogOptions;

fn temp_dir(name: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("spillway-{name}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

#[tokio::test(start_paused = true)]
async fn the_replay_log_holds_the_household_without_its_managed_loads_and_replays() {
    let dir = temp_dir("replay-log");
    let path = dir.join("bench.csv");
    let plant = Plant::start(1500.0).await;
    let yaml = plant.site_yaml(LOADS, "");
    let mut o = options(T0);
    o.replay_log = Some(ReplayLogOptions { path: path.clone(), every: Duration::from_secs(30) });
    let daemon = start(&yaml, o).await;
    status_until(&daemon, Duration::from_secs(10), "rules in charge", |s| s.mode == "normal").await;
    tokio::time::sleep(Duration::from_secs(120)).await;
    // Enough sun for the heater: it switches on, and the house must not grow by it.
    plant.set_pv(4500.0);
    status_until(&daemon, Duration::from_secs(60), "the heater on", |s| {
        s.loads.iter().any(|l| l.name == "water_heater" && l.on)
    })
    .await;
    tokio::time::sleep(Duration::from_secs(180)).await;
    // The status page shows the log at work (the writer thread runs on real time: give
    // it a moment for the rows just handed over).
    std::thread::sleep(Duration::from_millis(200));
    tokio::time::sleep(Duration::from_secs(1)).await;
    let shown = daemon.status().borrow().replay_log.clone().expect("the status shows the replay log");
    assert_eq!(shown.file, path.display().to_string());
    assert!(shown.rows_written >= 9, "{shown:?}");
    assert_eq!((shown.rows_waiting, shown.error.as_deref()), (0, None));
    daemon.shutdown();
    let summary = daemon.wait().await;

    let text = std::fs::read_to_string(&path).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("time,pv_w,house_w,pv_available_w"), "{text}");
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    let written = summary.replay_log.expect("the summary counts the replay log");
    assert_eq!(written.rows, rows.len() as u64);
    assert_eq!((written.late, written.dropped, written.unwritten), (0, 0, 0));
    // About five and a half minutes in 30 s rows, the first and last partial.
    assert!((11..=14).contains(&rows.len()), "{} rows:\n{text}", rows.len());
    let times: Vec<chrono::DateTime<chrono::FixedOffset>> =
        rows.iter().map(|r| chrono::DateTime::parse_from_rfc3339(r[0]).unwrap()).collect();
    assert!(times.windows(2).all(|w| w[1] > w[0]), "{text}");
    assert!(times[0].to_rfc3339().starts_with("2026-06-21T09:0"), "{text}");
    let number = |s: &str| s.parse::<f64>().unwrap();
    // The household is the bench's 400 W whatever the loads do: the ticks between a
    // switching and the meter's showing it are left out.
    let houses: Vec<f64> = rows.iter().map(|r| number(r[2])).collect();
    assert!(houses.iter().all(|h| (*h - HOUSE_W).abs() <= 20.0), "{houses:?}");
    // PV and what the array could give: 1.5 kW, then 4.5 kW available, with the
    // inverter given back what the heater takes.
    assert!((number(rows[1][3]) - 1500.0).abs() < 1.0, "{text}");
    let last = rows.len() - 2;
    assert!((number(rows[last][3]) - 4500.0).abs() < 1.0, "{text}");
    assert!(number(rows[last][1]) > 3000.0, "{text}");

    // `spillway replay` reads the log as it is, against the zero-export example's plant.
    let site = concat!(env!("CARGO_MANIFEST_DIR"), "/config/zero-export-house.yaml");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_spillway"))
        .args(["replay", site, path.to_str().unwrap(), "--report", "json", "--quiet"])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(report["replay"]["rows_used"], rows.len(), "{report}");
    assert_eq!(report["replay"]["rows_rejected"], 0, "{report}");
    std::fs::remove_dir_all(&dir).ok();
}

#[tokio::test(start_paused = true)]
async fn a_second_run_appends_to_its_log_and_a_foreign_file_stops_the_start() {
    let dir = temp_dir("replay-log-append");
    let path = dir.join("bench.csv");
    let plant = Plant::start(800.0).await;
    let yaml = plant.site_yaml(LOADS, "");
    let log = || Some(ReplayLogOptions { path: path.clone(), every: Duration::from_secs(10) });
    for run in 0..2 {
        let mut o = options(spillway::units::Timestamp(T0.0 + run * 60_000));
        o.replay_log = log();
        let daemon = start(&yaml, o).await;
        tokio::time::sleep(Duration::from_secs(35)).await;
        daemon.shutdown();
        daemon.wait().await;
    }
    let text = std::fs::read_to_string(&path).unwrap();
    assert_eq!(text.matches("time,").count(), 1, "one header:\n{text}");
    assert!(text.lines().count() >= 7, "{text}");

    // A file with other columns is not written into.
    let other = dir.join("other.csv");
    std::fs::write(&other, "time,power\n1,2\n").unwrap();
    let mut o = options(T0);
    o.replay_log = Some(ReplayLogOptions { path: other.clone(), every: Duration::from_secs(60) });
    let site = support::site(&yaml);
    let e = spillway::daemon::Daemon::start(site, o).await.expect_err("a foreign file refused");
    assert!(e.to_string().contains("not a replay log"), "{e}");
    assert_eq!(std::fs::read_to_string(&other).unwrap(), "time,power\n1,2\n");
    std::fs::remove_dir_all(&dir).ok();
}
