//! Restarting the daemon mid-day: the counters survive in the state file, and the pool
//! pump's daily hours go on from where they were; a restart on another day starts
//! them afresh. Paused tokio clock over loopback Modbus TCP.

mod daemon_support;
mod support;

use std::path::PathBuf;
use std::time::Duration;

use daemon_support::{Plant, T0, load, options, start, status_until};
use spillway::daemon::state_file;

const PUMP_ONLY: &str = "
  - name: pool_pump
    priority: 1
    rated: 1.1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.2kW for 10s
    stop: import > 400W for 10s
    min_on: 2min
    min_off: 2min
    obligations:
      - run: 5h
        grid_window: 16:00..21:00
";

fn state_path(test: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("spillway-daemon-{test}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let p = dir.join("bench.state.json");
    let _ = std::fs::remove_file(&p);
    p
}

#[tokio::test(start_paused = true)]
async fn a_restart_mid_day_keeps_the_pumps_hours_and_another_day_starts_afresh() {
    let plant = Plant::start(2500.0).await;
    let path = state_path("restart");
    let yaml = plant.site_yaml(PUMP_ONLY, "");

    // First run: ten minutes with the pump on surplus.
    let mut opts = options(T0);
    opts.state_file = Some(path.clone());
    let daemon = start(&yaml, opts).await;
    status_until(&daemon, Duration::from_secs(60), "pump on", |s| load(s, "pool_pump").on).await;
    tokio::time::sleep(Duration::from_secs(600)).await;
    daemon.shutdown();
    let summary = daemon.wait().await;
    assert!(summary.saves >= 1);
    let saved = state_file::read(&path).unwrap().expect("a state file");
    let pump = saved.counters.loads.iter().find(|l| l.name == "pool_pump").unwrap();
    println!("saved after the first run: pump ran {:.0} s, {:.0} Wh", pump.runtime_today_s, pump.energy_today_wh);
    assert!((580.0..=620.0).contains(&pump.runtime_today_s), "{pump:?}");
    assert!(pump.energy_today_wh > 150.0, "{pump:?}");

    // Second run, later the same day: the counters come back before the first tick.
    let mut opts = options(T0.plus(Duration::from_secs(900)));
    opts.state_file = Some(path.clone());
    let daemon = start(&yaml, opts).await;
    let s = daemon.status().borrow().clone();
    assert_eq!(s.mode, "starting");
    let restored = load(&s, "pool_pump").runtime_today_s;
    assert!((restored - pump.runtime_today_s).abs() < 1.0, "{restored} vs {}", pump.runtime_today_s);
    assert!(load(&s, "pool_pump").obligations[0].progress.ends_with("of 5 h"));
    // It was on when the first run stopped (which switched it off): its `min_off` of
    // 2 min runs from this start.
    let started = tokio::time::Instant::now();
    status_until(&daemon, Duration::from_secs(180), "pump on", |s| load(s, "pool_pump").on).await;
    assert!(started.elapsed() >= Duration::from_secs(119), "min_off from the start: {:?}", started.elapsed());
    tokio::time::sleep(Duration::from_secs(300)).await;
    let s = daemon.status().borrow().clone();
    let now = load(&s, "pool_pump").runtime_today_s;
    println!("after the second run's 5 min: pump {now:.0} s today ({})", load(&s, "pool_pump").obligations[0].progress);
    assert!(now >= restored + 270.0, "the hours go on: {now} vs {restored}");
    daemon.shutdown();
    daemon.wait().await;

    // Third run, the next morning: yesterday's hours do not count today.
    let mut opts = options(T0.plus(Duration::from_secs(24 * 3600)));
    opts.state_file = Some(path.clone());
    let daemon = start(&yaml, opts).await;
    assert_eq!(load(&daemon.status().borrow(), "pool_pump").runtime_today_s, 0.0);
    daemon.shutdown();
    daemon.wait().await;
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

#[tokio::test(start_paused = true)]
async fn a_corrupt_state_file_is_reported_and_replaced() {
    let plant = Plant::start(0.0).await;
    let path = state_path("corrupt");
    std::fs::write(&path, "{ half a document").unwrap();
    let mut opts = options(T0);
    opts.state_file = Some(path.clone());
    let daemon = start(&plant.site_yaml(PUMP_ONLY, ""), opts).await;
    status_until(&daemon, Duration::from_secs(10), "ticking", |s| s.time.is_some()).await;
    daemon.shutdown();
    daemon.wait().await;
    let doc = state_file::read(&path).unwrap().expect("replaced by a good one");
    assert_eq!(doc.site, "Bench");
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// A state file that cannot be written stops the daemon at start with advice, instead of
/// a warning at every save while the counters are lost: checked with a directory that
/// does not exist (a typo in `--state`, or `/var/lib/spillway` never created).
#[tokio::test(start_paused = true)]
async fn a_state_file_in_a_missing_directory_stops_the_start_with_advice() {
    let plant = Plant::start(0.0).await;
    let parent = state_path("missing-dir").parent().unwrap().to_path_buf();
    let missing = parent.join("not-created");
    let mut opts = options(T0);
    opts.state_file = Some(missing.join("bench.state.json"));
    let site = support::site(&plant.site_yaml(PUMP_ONLY, ""));
    let err = spillway::daemon::Daemon::start(site, opts).await.expect_err("the daemon must not start");
    let msg = err.to_string();
    println!("{msg}");
    assert!(msg.contains("cannot be written"), "{msg}");
    assert!(msg.contains(&format!("its directory {} does not exist", missing.display())), "{msg}");
    assert!(msg.contains("--state"), "{msg}");
    assert!(!missing.exists(), "nothing is created behind the installer's back");
    let _ = std::fs::remove_dir_all(&parent);
}

/// The counters are written once at start, so a freshly installed site has its state
/// file (and its directory proven writable) before the first periodic save.
#[tokio::test(start_paused = true)]
async fn the_state_file_is_written_at_start() {
    let plant = Plant::start(0.0).await;
    let path = state_path("written-at-start");
    let mut opts = options(T0);
    opts.state_file = Some(path.clone());
    let daemon = start(&plant.site_yaml(PUMP_ONLY, ""), opts).await;
    let doc = state_file::read(&path).unwrap().expect("written at start");
    assert_eq!(doc.site, "Bench");
    assert_eq!(doc.stopped_cleanly, Some(false), "a save while running");
    daemon.shutdown();
    daemon.wait().await;
    let doc = state_file::read(&path).unwrap().unwrap();
    assert_eq!(doc.stopped_cleanly, Some(true), "the last save of a stop in order");
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// A controller killed (`kill -9`, a crash, a power cut) leaves a state file whose last
/// save was made while running: the next start says so, since nothing held the loads
/// in between. A stop in order, and a file from before this was kept, say nothing.
#[tokio::test(start_paused = true)]
async fn a_start_after_a_controller_that_did_not_stop_in_order_says_so() {
    let plant = Plant::start(0.0).await;
    let path = state_path("unclean-stop");
    let yaml = plant.site_yaml(PUMP_ONLY, "");
    let mut opts = options(T0);
    opts.state_file = Some(path.clone());
    let daemon = start(&yaml, opts).await;
    daemon.shutdown();
    daemon.wait().await;
    let clean = std::fs::read(&path).unwrap();
    let mut killed: serde_json::Value = serde_json::from_slice(&clean).unwrap();
    killed["stopped_cleanly"] = false.into();
    let mut old: serde_json::Value = serde_json::from_slice(&clean).unwrap();
    old.as_object_mut().unwrap().remove("stopped_cleanly");
    for (file, warned) in [(killed, true), (serde_json::from_slice(&clean).unwrap(), false), (old, false)] {
        std::fs::write(&path, serde_json::to_vec(&file).unwrap()).unwrap();
        let (logs, _guard) = support::Logs::capture();
        let mut opts = options(T0.plus(Duration::from_secs(600)));
        opts.state_file = Some(path.clone());
        let daemon = start(&yaml, opts).await;
        daemon.shutdown();
        daemon.wait().await;
        let text = logs.text();
        let line = text.lines().find(|l| l.contains("did not stop in order"));
        assert_eq!(line.is_some(), warned, "{file}\n{text}");
        if let Some(line) = line {
            assert!(line.contains("WARN") && line.contains("every load starts in its safe state"), "{line}");
        }
    }
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// A state file written under another site name (a renamed site, or another site's file
/// given to `--state` by mistake): its counters are restored for loads of the same name,
/// with a warning that names both sites.
#[tokio::test(start_paused = true)]
async fn a_state_file_of_another_site_name_is_restored_with_a_warning() {
    let plant = Plant::start(2500.0).await;
    let path = state_path("other-site");
    let yaml = plant.site_yaml(PUMP_ONLY, "");
    let mut opts = options(T0);
    opts.state_file = Some(path.clone());
    let daemon = start(&yaml, opts).await;
    status_until(&daemon, Duration::from_secs(60), "pump on", |s| load(s, "pool_pump").on).await;
    tokio::time::sleep(Duration::from_secs(300)).await;
    daemon.shutdown();
    daemon.wait().await;
    let mut doc: serde_json::Value = serde_json::from_slice(&std::fs::read(&path).unwrap()).unwrap();
    doc["site"] = "Hillcrest Cottage".into();
    std::fs::write(&path, serde_json::to_vec(&doc).unwrap()).unwrap();

    let (logs, _guard) = support::Logs::capture();
    let mut opts = options(T0.plus(Duration::from_secs(600)));
    opts.state_file = Some(path.clone());
    let daemon = start(&yaml, opts).await;
    let restored = load(&daemon.status().borrow(), "pool_pump").runtime_today_s;
    daemon.shutdown();
    daemon.wait().await;
    let text = logs.text();
    let warning = text.lines().find(|l| l.contains("another site name")).unwrap_or_else(|| panic!("{text}"));
    assert!(warning.contains("WARN"), "{warning}");
    assert!(warning.contains("Hillcrest Cottage") && warning.contains("Bench"), "{warning}");
    assert!(restored > 250.0, "the pump's minutes come back: {restored} s");
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// A save of the state file that hangs (a dying SD card, a stalled network file system:
/// here a FIFO where the temporary file goes, which blocks its opening until something
/// reads it) must not hold up the controller. Before, the control task awaited every
/// save: while one hung no tick ran, so a meter that fell silent meanwhile sent nothing
/// to its safe state and the inverter was not curtailed; and a stop waited on the save
/// before it let the links make their last pass, so it hung until systemd killed it.
/// A blocking task in flight stops the paused clock's auto-advance, so the test moves
/// the clock itself; the disk is released after 20 s of real time at the latest, so the
/// test cannot hang.
#[cfg(unix)]
#[tokio::test(start_paused = true)]
async fn a_hanging_state_file_save_holds_up_neither_the_ticks_nor_the_stop() {
    use std::sync::Arc;
    use std::sync::atomic::{AtomicBool, Ordering};

    let plant = Plant::start(4200.0).await;
    let path = state_path("hanging-save");
    let mut opts = options(T0);
    opts.state_file = Some(path.clone());
    let daemon = start(&plant.site_yaml(daemon_support::LOADS, ""), opts).await;
    status_until(&daemon, Duration::from_secs(60), "heater on", |s| load(s, "water_heater").on).await;

    // From now on every save blocks in opening `<state>.tmp`.
    let fifo = path.with_file_name("bench.state.json.tmp");
    let _ = std::fs::remove_file(&fifo);
    let made = std::process::Command::new("mkfifo").arg(&fifo).status().expect("mkfifo runs");
    assert!(made.success(), "mkfifo failed");
    let released = Arc::new(AtomicBool::new(false));
    let (release, wait) = std::sync::mpsc::channel::<()>();
    let valve = {
        let (fifo, released) = (fifo.clone(), Arc::clone(&released));
        std::thread::spawn(move || {
            let _ = wait.recv_timeout(Duration::from_secs(20));
            released.store(true, Ordering::SeqCst);
            // Opening the read end lets the blocked writer through.
            let _ = std::fs::read(&fifo);
        })
    };
    let (logs, _guard) = support::Logs::capture();

    // Past the next periodic save (every 30 s): it hangs from here.
    advance_until(Duration::from_secs(40), "40 s", || false).await;
    plant.meter.set_silent(true);
    let started = tokio::time::Instant::now();
    advance_until(Duration::from_secs(10), "heater off and the inverter at its safe limit", || {
        plant.last().is_some_and(|s| !s.heater && s.limit == 0.0)
    })
    .await;
    println!("fail-safe {:?} after the meter fell silent, the save hanging", started.elapsed());
    assert!(!released.load(Ordering::SeqCst), "the fail-safe waited for the disk");

    // A stop with the save still hanging: safe states written, the daemon gone within
    // the unit's TimeoutStopSec (30 s), and the log says the counters were not saved.
    plant.meter.set_silent(false);
    advance_until(Duration::from_secs(180), "heater on again", || plant.last().is_some_and(|s| s.heater)).await;
    let stop = tokio::time::Instant::now();
    daemon.shutdown();
    let waiting = tokio::spawn(daemon.wait());
    advance_until(Duration::from_secs(30), "the daemon stopped", || waiting.is_finished()).await;
    println!("stopped {:?} after the request, the save still hanging", stop.elapsed());
    assert!(!released.load(Ordering::SeqCst), "the stop waited for the disk");
    waiting.await.unwrap();
    advance_until(Duration::from_secs(1), "heater off and the inverter at its safe limit", || {
        plant.last().is_some_and(|s| !s.heater && s.limit == 0.0)
    })
    .await;
    let text = logs.text();
    assert!(text.lines().any(|l| l.contains("counters NOT saved at shutdown")), "{text}");

    let _ = release.send(());
    valve.join().unwrap();
    let _ = std::fs::remove_file(&fifo);
}

/// Moves the paused clock by hand, 50 ms at a time, until `cond` holds; panics once
/// `limit` has passed (`|| false` just moves it by `limit`).
async fn advance_until(limit: Duration, what: &str, mut cond: impl FnMut() -> bool) {
    let end = tokio::time::Instant::now() + limit;
    while !cond() {
        if tokio::time::Instant::now() >= end {
            assert!(what == "40 s", "not within {limit:?}: {what}");
            return;
        }
        tokio::time::advance(Duration::from_millis(50)).await;
        // Loopback bytes are real: give them a moment, then let the tasks take them.
        std::thread::sleep(Duration::from_micros(200));
        for _ in 0..4 {
            tokio::task::yield_now().await;
        }
    }
}
