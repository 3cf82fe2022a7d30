//! Faults a live site meets, against the daemon over loopback Modbus TCP: a meter that
//! goes silent, devices that restart, exception responses. Paused tokio clock; figures
//! printed in tokio time.

mod daemon_support;
mod support;

use std::time::Duration;

use daemon_support::{LOADS, Plant, T0, load, options, plant_until, start, status_until};
use tokio_modbus::ExceptionCode;

/// Runs a plant at 4.2 kW of PV until the heater has run a while (export cleared,
/// heater on, curtailment released).
async fn running() -> (Plant, spillway::daemon::Daemon) {
    let plant = Plant::start(4200.0).await;
    let daemon = start(&plant.site_yaml(LOADS, ""), options(T0)).await;
    settle(&plant, &daemon).await;
    (plant, daemon)
}

async fn settle(plant: &Plant, daemon: &spillway::daemon::Daemon) {
    status_until(daemon, Duration::from_secs(60), "heater on", |s| load(s, "water_heater").on).await;
    plant_until(plant, Duration::from_secs(60), "heater drawing", |s| s.heater).await;
    tokio::time::sleep(Duration::from_secs(60)).await;
}

#[tokio::test(start_paused = true)]
async fn a_silent_meter_sends_the_loads_to_safe_states_and_curtails_within_the_timeout() {
    let (plant, daemon) = running().await;
    assert!(plant.last().unwrap().heater);
    let silent_at = tokio::time::Instant::now();
    plant.meter.set_silent(true);
    let safe = plant_until(&plant, Duration::from_secs(10), "heater off and PV at 0 W", |s| {
        !s.heater && s.limit == 0.0 && s.pv == 0.0
    })
    .await;
    let took = safe.at - silent_at;
    let s = status_until(&daemon, Duration::from_secs(2), "fail-safe", |s| s.mode == "failsafe").await;
    println!(
        "meter silent → heater off and inverter at 0 W after {} ms of tokio time (stale after 2.5 s, tick 1 s)",
        took.as_millis()
    );
    // Stale after 2.5 s (the default), noticed at the next tick, written at once.
    assert!(took <= Duration::from_millis(3600), "{took:?}");
    assert_eq!(load(&s, "water_heater").reason, "failsafe");
    assert_eq!(s.inverter.as_ref().unwrap().reason, "failsafe");
    assert_eq!(s.devices[0].up, Some(false), "the meter is reported down");
    // A meter lost after it answered is a lost signal, not a wait for the first readings.
    assert!(!s.recent.iter().any(|e| e.text.starts_with("still in fail-safe since start")), "{:?}", s.recent);

    // The meter answers again: the daemon resumes, calmly.
    let before = daemon.status().borrow().recent.len();
    plant.meter.set_silent(false);
    status_until(&daemon, Duration::from_secs(30), "back to normal", |s| s.mode == "normal").await;
    tokio::time::sleep(Duration::from_secs(180)).await;
    let s = daemon.status().borrow().clone();
    let switchings = s.recent.iter().filter(|e| e.text.contains(" → ") && !e.text.starts_with("inverter")).count();
    println!("after the meter returned: {switchings} load switchings in 3 min ({} events before)", before);
    assert!(load(&s, "water_heater").on, "the heater runs again: {:?}", load(&s, "water_heater"));
    daemon.shutdown();
    daemon.wait().await;
}

#[tokio::test(start_paused = true)]
async fn a_site_whose_meter_never_answers_says_why_it_stays_in_fail_safe() {
    // Silent from the start there is no change of mode to report: the daemon says, once,
    // after 10 s, which signal it is still waiting for.
    let plant = Plant::start(4200.0).await;
    plant.meter.set_silent(true);
    let daemon = start(&plant.site_yaml(LOADS, ""), options(T0)).await;
    let s = status_until(&daemon, Duration::from_secs(15), "the wait reported", |s| {
        s.recent.iter().any(|e| e.text.starts_with("still in fail-safe since start"))
    })
    .await;
    assert_eq!(s.mode, "failsafe");
    let said: Vec<_> = s.recent.iter().filter(|e| e.text.starts_with("still in fail-safe")).collect();
    assert_eq!(said.len(), 1, "{said:?}");
    assert!(said[0].text.contains("\"grid\""), "names the signal: {}", said[0].text);
    // The points that never had a reading are named too (on a site that may export, this
    // is the only word about a mistyped topic).
    let never: Vec<_> = s.recent.iter().filter(|e| e.text.starts_with("no reading at all since start")).collect();
    assert_eq!(never.len(), 1, "{:?}", s.recent);
    assert!(never[0].text.contains("\"grid\"") && !never[0].text.contains("\"pv\""), "{}", never[0].text);
    tokio::time::sleep(Duration::from_secs(30)).await;
    let s = daemon.status().borrow().clone();
    assert_eq!(s.recent.iter().filter(|e| e.text.starts_with("still in fail-safe")).count(), 1, "said once");

    // A site whose meter answers never says it.
    let plant = Plant::start(4200.0).await;
    let daemon2 = start(&plant.site_yaml(LOADS, ""), options(T0)).await;
    settle(&plant, &daemon2).await;
    let s = daemon2.status().borrow().clone();
    assert!(!s.recent.iter().any(|e| e.text.starts_with("still in fail-safe")), "{:?}", s.recent);
    assert!(!s.recent.iter().any(|e| e.text.starts_with("no reading at all")), "{:?}", s.recent);
    for d in [daemon, daemon2] {
        d.shutdown();
        d.wait().await;
    }
}

/// Load switchings (not limit changes) in the status's recent events after `from`
/// (RFC 3339 strings of one format compare in time order).
fn load_switchings(s: &spillway::status::Status, from: &str) -> Vec<String> {
    s.recent
        .iter()
        .filter(|e| e.time.as_str() >= from && e.text.contains(" → ") && !e.text.starts_with("inverter"))
        .map(|e| format!("{} {}", e.time, e.text))
        .collect()
}

#[tokio::test(start_paused = true)]
async fn restarted_devices_get_their_commands_back_without_a_burst_of_switchings() {
    let plant = Plant::start(4200.0).await;
    let relay_points = "
  heater_relay: { device: relays, coil: 0, unit: bool }
  pump_relay: { device: relays, coil: 1, unit: bool }";
    let yaml = plant.site_yaml(LOADS, "").replace("\ninverter:", &format!("{relay_points}\ninverter:"));
    let daemon = start(&yaml, options(T0)).await;
    settle(&plant, &daemon).await;

    // The relay module and the inverter power-cycle: coils fall back to off, and until
    // the links reconnect neither the relay nor the limit can be written. The relays'
    // own coils are read as points, so the link notices the dropped connection at its
    // next poll (a link with nothing to read notices at its next re-assertion, 30 s).
    let t = daemon.status().borrow().time.clone().unwrap();
    let rebooted = tokio::time::Instant::now();
    plant.devices.reboot();
    assert!(!plant.devices.coil(3, 0).unwrap());
    plant_until(&plant, Duration::from_secs(1), "heater relay open", |s| s.at > rebooted && !s.heater).await;
    let back = plant_until(&plant, Duration::from_secs(10), "heater relay re-asserted", |s| s.heater).await;
    println!("relay module restarted: heater coil re-asserted {} ms later", (back.at - rebooted).as_millis());
    tokio::time::sleep(Duration::from_secs(120)).await;
    let s = daemon.status().borrow().clone();
    let after = load_switchings(&s, &t);
    println!("switchings in the 2 min after the restart: {after:?}");
    // The export while the relay was open may escalate the guard and the import while
    // it releases may stop a load by its own rule; but no load switches twice.
    for l in ["water_heater", "pool_pump"] {
        assert!(after.iter().filter(|e| e.contains(l)).count() <= 1, "{l} chattered: {after:?}");
    }
    assert_eq!(s.mode, "normal");

    // The meter restarts too: no chattering either.
    let t = s.time.clone().unwrap();
    plant.meter.reboot();
    tokio::time::sleep(Duration::from_secs(240)).await;
    let s = daemon.status().borrow().clone();
    let after = load_switchings(&s, &t);
    println!("switchings in the 4 min after the meter restarted: {after:?}");
    for l in ["water_heater", "pool_pump"] {
        assert!(after.iter().filter(|e| e.contains(l)).count() <= 1, "{l} chattered: {after:?}");
    }
    assert_eq!(s.mode, "normal");
    assert!(s.devices.iter().all(|d| d.up == Some(true)), "{:?}", s.devices);
    daemon.shutdown();
    daemon.wait().await;
}

#[tokio::test(start_paused = true)]
async fn exception_responses_are_counted_logged_and_ignored() {
    let (plant, daemon) = running().await;
    let (logs, _guard) = support::Logs::capture();
    // The inverter refuses to report PV (function 3 at 0): the guard works on the meter alone.
    plant.devices.with(|s| {
        s.exceptions.insert((3, 0), ExceptionCode::ServerDeviceBusy);
    });
    tokio::time::sleep(Duration::from_secs(20)).await;
    // One warning for the kind, then repeats only once a minute: not one per poll.
    let text = logs.text();
    let warnings: Vec<&str> = text.lines().filter(|l| l.contains("WARN") && l.contains("exception")).collect();
    assert_eq!(warnings.len(), 1, "{text}");
    assert!(warnings[0].contains("device=inverter") && warnings[0].contains("function=3"), "{}", warnings[0]);
    let s = daemon.status().borrow().clone();
    let inverter = s.devices.iter().find(|d| d.name == "inverter").unwrap();
    println!("inverter: {} exception responses in 20 s", inverter.exceptions);
    assert!(inverter.exceptions >= 10, "{inverter:?}");
    assert_eq!(inverter.up, Some(true), "an exception is not a dead device");
    assert_eq!(s.mode, "normal", "the grid meter still answers");
    assert!(load(&s, "water_heater").on);
    let before = s.time.clone();
    tokio::time::sleep(Duration::from_secs(5)).await;
    assert_ne!(daemon.status().borrow().time, before, "still ticking");
    daemon.shutdown();
    let summary = daemon.wait().await;
    assert!(summary.exceptions >= 10);
}

/// If the engine panics while the site runs (a bug), the daemon must not run on with its
/// links up and no controller: the panic is caught, the loads go to their safe states and
/// the inverter to its safe limit, the counters are saved, and `run` ends with an error
/// (so a service manager restarts it). Triggered by a test-only fail point.
#[tokio::test(start_paused = true)]
async fn an_engine_panic_sends_the_safe_states_and_stops_the_daemon_with_an_error() {
    let plant = Plant::start(4200.0).await;
    let mut opts = options(T0);
    opts.fail_at_tick = Some(150);
    let daemon = start(&plant.site_yaml(LOADS, ""), opts).await;
    settle(&plant, &daemon).await;
    assert!(plant.last().unwrap().heater, "the heater runs before the failure");
    let summary =
        tokio::time::timeout(Duration::from_secs(120), daemon.wait()).await.expect("the daemon stops by itself");
    let why = summary.engine_failed.expect("the failure is reported");
    assert!(why.contains("fail point: tick 150"), "{why}");
    let safe = plant_until(&plant, Duration::from_secs(10), "heater off, inverter at its safe limit", |s| {
        !s.heater && !s.pump && s.limit == 0.0
    })
    .await;
    println!("after the engine failed: heater {}, pump {}, limit {} W", safe.heater, safe.pump, safe.limit);
}

/// At shutdown each device link says whether its safe state was written: the inverter,
/// reachable, takes its safe limit; a relay board that cannot be reached (its port
/// closed) gets one more connection attempt and then a warning that names it, so the
/// log never claims a safe state that was not delivered.
#[tokio::test(start_paused = true)]
async fn the_shutdown_log_names_a_device_whose_safe_state_was_not_written() {
    let plant = Plant::start(0.0).await;
    let closed = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let yaml = plant.site_yaml(LOADS, "");
    let relays = format!("relays:   {{ modbus_tcp: 127.0.0.1:{}", plant.devices.addr.port());
    assert!(yaml.contains(&relays), "the test site's relay line moved");
    let yaml = yaml.replace(&relays, &format!("relays:   {{ modbus_tcp: 127.0.0.1:{closed}"));
    let (logs, _guard) = support::Logs::capture();
    let daemon = start(&yaml, options(T0)).await;
    status_until(&daemon, Duration::from_secs(30), "ticking", |s| s.time.is_some()).await;
    tokio::time::sleep(Duration::from_secs(5)).await;
    daemon.shutdown();
    daemon.wait().await;
    let text = logs.text();
    let line = |device: &str, what: &str| {
        text.lines().find(|l| l.contains(what) && l.contains(&format!("device={device}"))).map(str::to_owned)
    };
    let relays = line("relays", "safe state NOT written at shutdown").unwrap_or_else(|| panic!("{text}"));
    assert!(relays.contains("WARN") && relays.contains("cannot be reached"), "{relays}");
    assert!(line("inverter", "safe state written at shutdown").is_some(), "{text}");
    assert!(line("relays", "safe state written at shutdown").is_none(), "{text}");
}

/// SIGINT while a request to a slow inverter is in flight: that connection is spoilt by
/// the cancellation, so the safe limit goes out on a fresh one — before, the link just
/// ended, the inverter kept its limit and nothing in the log said so.
#[tokio::test(start_paused = true)]
async fn a_shutdown_in_the_middle_of_a_request_still_writes_the_safe_limit() {
    let (plant, daemon) = running().await;
    assert_ne!(plant.devices.holding(2, 10), Some(0), "the inverter is not at its safe limit before");
    let (logs, _guard) = support::Logs::capture();
    plant.devices.set_silent(true);
    plant.devices.take_log();
    // Wait until a request to the inverter hangs unanswered, then stop.
    support::until("an inverter request in flight", || plant.devices.take_log().iter().any(|r| r.unit == 2)).await;
    daemon.shutdown();
    plant.devices.set_silent(false);
    daemon.wait().await;
    let text = logs.text();
    assert!(
        text.lines().any(|l| l.contains("safe state written at shutdown") && l.contains("device=inverter")),
        "{text}"
    );
    assert_eq!(plant.devices.holding(2, 10), Some(0), "the safe limit (0 W) is written");
}

/// A safe state the device refuses (an exception response) is reported as NOT written.
#[tokio::test(start_paused = true)]
async fn a_safe_state_refused_at_shutdown_is_logged_as_not_written() {
    let (plant, daemon) = running().await;
    let (logs, _guard) = support::Logs::capture();
    // The relay board refuses coil writes from now on (function 5, coil 0: the heater).
    plant.devices.with(|s| s.exceptions.insert((5, 0), tokio_modbus::ExceptionCode::ServerDeviceFailure));
    daemon.shutdown();
    daemon.wait().await;
    let text = logs.text();
    let line = text
        .lines()
        .find(|l| l.contains("device=relays") && l.contains("at shutdown"))
        .unwrap_or_else(|| panic!("{text}"));
    assert!(line.contains("WARN") && line.contains("NOT written") && line.contains("refused"), "{line}");
}

/// A device link that dies while the site runs (a panic: a bug) leaves its device unread
/// and uncommanded, so the daemon stops as after an engine failure: safe states on the
/// devices it can still reach, and an error. Here the meter's link dies; the heater goes
/// off and the inverter to its safe limit. Triggered by a test-only fail point.
#[tokio::test(start_paused = true)]
async fn a_link_that_dies_stops_the_daemon_with_safe_states_and_an_error() {
    let plant = Plant::start(4200.0).await;
    let mut opts = options(T0);
    opts.fail_link_after = Some(("meter".to_owned(), Duration::from_secs(180)));
    let daemon = start(&plant.site_yaml(LOADS, ""), opts).await;
    settle(&plant, &daemon).await;
    assert!(plant.last().unwrap().heater, "the heater runs before the failure");
    let summary =
        tokio::time::timeout(Duration::from_secs(120), daemon.wait()).await.expect("the daemon stops by itself");
    let why = summary.engine_failed.expect("the failure is reported");
    assert!(why.contains("the link of meter panicked"), "{why}");
    plant_until(&plant, Duration::from_secs(10), "heater off, inverter at its safe limit", |s| {
        !s.heater && !s.pump && s.limit == 0.0
    })
    .await;
}

/// A panic in the control task outside the engine's tick (here while it takes in a
/// sample: a bug anywhere in the task) kills the task itself, not just one tick. The
/// loads must still go to their safe states and the inverter to its safe limit before
/// the links stop: before, the links were cancelled with the last tick's commands still
/// in their channels, wrote those again (the heater on, the limit raised) and logged
/// them as "safe state written at shutdown". Triggered by a test-only fail point.
#[tokio::test(start_paused = true)]
async fn a_control_task_that_dies_outside_the_tick_still_sends_the_safe_states() {
    let plant = Plant::start(4200.0).await;
    let mut opts = options(T0);
    // Three points read every second: about 150 s in, after the heater has started.
    opts.fail_at_sample = Some(450);
    let daemon = start(&plant.site_yaml(LOADS, ""), opts).await;
    settle(&plant, &daemon).await;
    assert!(plant.last().unwrap().heater, "the heater runs before the failure");
    let summary =
        tokio::time::timeout(Duration::from_secs(300), daemon.wait()).await.expect("the daemon stops by itself");
    let why = summary.engine_failed.expect("the failure is reported");
    assert!(why.contains("panic"), "{why}");
    let safe = plant_until(&plant, Duration::from_secs(10), "heater off, inverter at its safe limit", |s| {
        !s.heater && !s.pump && s.limit == 0.0
    })
    .await;
    println!("after the control task died: heater {}, pump {}, limit {} W", safe.heater, safe.pump, safe.limit);
}
